// Product tables of pairs of formats of at most 4 bits (`lobit lut A --product B`), compiled
// (C99, C++17 and the CUDA header as host C++) and compared with the library's decoded values:
// every entry is decode_a * decode_b exactly, and k * 2^exponent equals it.
#include <doctest/doctest.h>

#include <nlohmann/json.hpp>
#include <sstream>

#include "lobit/error.hpp"
#include "lut_harness.hpp"

using namespace lobit;
using namespace lobit::test;

namespace {

const std::pair<const char*, const char*> pairs[] = {
    {"e2m1", "e2m1"},  {"e2m1", "int4"}, {"int4", "int4"},   {"uint4", "int4"}, {"int2", "e2m1"},
    {"uint2", "uint3"}, {"pow2+exp=3+bias=3", "e2m1"}, {"float+exp=3+man=0+special=ieee", "e2m1"},
    {"float+exp=2+man=1+special=top-nan", "int3"}, {"codebook+values=-1.5/-0.25/0/0.75", "int4"}};

struct ProductEntry {
  const char* name;
  std::uint32_t (*f32_bits)(std::uint32_t, std::uint32_t);
  std::int32_t (*k)(std::uint32_t, std::uint32_t);  // null without an integer form
};

void run_products(emit::LutLanguage lang) {
  const bool cxx = lang != emit::LutLanguage::c;
  const std::string sub = lang == emit::LutLanguage::c ? "product_c" : (lang == emit::LutLanguage::cpp ? "product_cpp" : "product_cuda");
  const auto dir = work_dir(sub);
  std::string w = cxx ? "#include <cstddef>\n#include <cstdint>\n" : "#include <stddef.h>\n#include <stdint.h>\n";
  std::vector<emit::ProductTable> tables;
  std::vector<std::string> stems;
  int i = 0;
  for (auto [sa, sb] : pairs) {
    const auto a = parse_element(sa), b = parse_element(sb);
    emit::LutOptions o;
    o.language = lang;
    o.cpp_namespace = "lobit_product_test";
    o.stem = fmt::format("p{}", i++);
    o.command = fmt::format("lut_product_test {} {}", sa, sb);
    const std::string text = emit::emit_product_lut(*a, *b, o);
    REQUIRE(text == emit::emit_product_lut(*a, *b, o));
    const std::string h = (dir / (o.stem + ".h")).string();
    write_text(h, text);
    w += "#include \"" + h + "\"\n";
    tables.push_back(emit::product_table(*a, *b));
    stems.push_back(o.stem);
  }
  const std::string q = cxx ? "lobit_product_test::" : "";
  for (std::size_t k = 0; k < stems.size(); ++k) {
    w += fmt::format("static uint32_t pf_{}(uint32_t a, uint32_t b) {{ return {}lobit_{}_product_f32_bits_of(a, b); }}\n", k, q,
                     stems[k]);
    if (tables[k].integer)
      w += fmt::format("static int32_t pk_{}(uint32_t a, uint32_t b) {{ return {}lobit_{}_product_k_of(a, b); }}\n", k, q, stems[k]);
  }
  w += "typedef struct { const char* name; uint32_t (*f)(uint32_t, uint32_t); int32_t (*k)(uint32_t, uint32_t); } lobit_product_entry;\n";
  w += std::string(cxx ? "extern \"C\" " : "") + "const lobit_product_entry lobit_product_entries[] = {\n";
  for (std::size_t k = 0; k < stems.size(); ++k)
    w += fmt::format("  {{\"{}\", pf_{}, {}}},\n", stems[k], k, tables[k].integer ? fmt::format("pk_{}", k) : "0");
  w += "};\n";
  const auto src = dir / (cxx ? "wrapper.cpp" : "wrapper.c");
  write_text(src, w);
  std::string log;
  const auto so = dir / "wrapper.so";
  const std::string cmd = fmt::format(
      "\"{}\" {} -O2 -ffp-contract=off -fno-fast-math -Wall -Wextra -Werror -pedantic -shared -fPIC -o \"{}\" \"{}\" > \"{}.log\" 2>&1",
      cxx ? LOBIT_TEST_CXX_COMPILER : LOBIT_TEST_C_COMPILER, cxx ? "-std=c++17" : "-std=c99", so.string(), src.string(), so.string());
  const int rc = std::system(cmd.c_str());
  std::ifstream lf(so.string() + ".log");
  log.assign(std::istreambuf_iterator<char>(lf), {});
  REQUIRE_MESSAGE(rc == 0, cmd, "\n", log.substr(0, 4000));
  void* h = dlopen(so.c_str(), RTLD_NOW | RTLD_LOCAL);
  REQUIRE_MESSAGE(h != nullptr, dlerror());
  auto* entries = static_cast<const ProductEntry*>(dlsym(h, "lobit_product_entries"));
  REQUIRE(entries != nullptr);
  int integer_pairs = 0;
  for (std::size_t k = 0; k < stems.size(); ++k) {
    const auto a = parse_element(pairs[k].first), b = parse_element(pairs[k].second);
    INFO(pairs[k].first, " x ", pairs[k].second);
    REQUIRE(std::string(entries[k].name) == stems[k]);
    CHECK((entries[k].k != nullptr) == tables[k].integer);
    integer_pairs += tables[k].integer;
    std::int64_t kmax = 0;
    for (Code ca = 0; ca < (Code{1} << a->bits()); ++ca)
      for (Code cb = 0; cb < (Code{1} << b->bits()); ++cb) {
        // The exact product: both values are short binary64 numbers, so their binary64 product is exact
        // (the generator refuses pairs where it is not); IEEE 754 section 7.2 makes inf * 0 NaN.
        const double want = a->decode(ca) * b->decode(cb);
        const double got = std::bit_cast<float>(entries[k].f32_bits(static_cast<std::uint32_t>(ca), static_cast<std::uint32_t>(cb)));
        CHECK_MESSAGE(same_value(got, want), "codes ", ca, " ", cb, ": ", got, " vs ", want);
        if (entries[k].k) {
          const std::int32_t kk = entries[k].k(static_cast<std::uint32_t>(ca), static_cast<std::uint32_t>(cb));
          CHECK(std::ldexp(static_cast<double>(kk), tables[k].exponent) == want);
          kmax = std::max<std::int64_t>(kmax, std::llabs(kk));
        }
      }
    // The stated width holds every k, and one bit fewer would not (two's complement).
    if (tables[k].integer) {
      CHECK(kmax <= (std::int64_t{1} << (tables[k].product_bits - 1)));
      CHECK(kmax > (std::int64_t{1} << (tables[k].product_bits - 2)) - 1);
    }
  }
  CHECK(integer_pairs >= 6);
  // e2m1 x e2m1: 6 * 6 = 36 and 0.5 * 0.5 = 2^-2 (OCP MX v1.0 E2M1 values, from memory): k = 36 * 4 = 144 needs
  // 9 bits with sign.
  CHECK(tables[0].exponent == -2);
  CHECK(tables[0].product_bits == 9);
  dlclose(h);
}

}  // namespace

TEST_CASE("product tables (C99) are exact") { run_products(emit::LutLanguage::c); }
TEST_CASE("product tables (C++17) are exact") { run_products(emit::LutLanguage::cpp); }
TEST_CASE("product tables (CUDA header as host C++) are exact") { run_products(emit::LutLanguage::cuda); }

TEST_CASE("product tables refuse wide or inexact pairs") {
  emit::LutOptions o;
  CHECK_THROWS_AS(emit::emit_product_lut(*parse_element("e4m3"), *parse_element("e2m1"), o), Error);  // 8 bits
  CHECK_THROWS_AS(emit::emit_product_lut(*parse_element("nf4"), *parse_element("e2m1"), o), Error);   // not float32
  o.language = emit::LutLanguage::json;
  CHECK_THROWS_AS(emit::emit_product_lut(*parse_element("e4m3"), *parse_element("e2m1"), o), Error);
}

TEST_CASE("product tables as json and csv carry every exact product") {
  for (auto [sa, sb] : pairs) {
    const auto a = parse_element(sa), b = parse_element(sb);
    INFO(sa, " x ", sb);
    emit::LutOptions o;
    o.language = emit::LutLanguage::json;
    o.command = "lut_product_test";
    const std::string js = emit::emit_product_lut(*a, *b, o);
    CHECK(js == emit::emit_product_lut(*a, *b, o));
    const auto j = nlohmann::json::parse(js);
    o.language = emit::LutLanguage::csv;
    std::istringstream csv(emit::emit_product_lut(*a, *b, o));
    std::string line;
    std::getline(csv, line);
    CHECK(line == "index,code_a,code_b,value,f32_bits,k");
    const Code na = Code{1} << a->bits(), nb = Code{1} << b->bits();
    REQUIRE(j["entries"].size() == na * nb);
    const bool integer = j["integer"].get<bool>();
    const int e = integer ? j["exponent"].get<int>() : 0;
    std::size_t bad = 0;
    std::string first;
    for (Code ca = 0; ca < na; ++ca)
      for (Code cb = 0; cb < nb; ++cb) {
        const std::size_t i = (ca << b->bits()) | cb;
        const auto& en = j["entries"][i];
        const double want = a->decode(ca) * b->decode(cb);  // the library's values; binary64 holds these products
        const double got = en["value"].is_null() ? NAN : std::strtod(en["value"].get<std::string>().c_str(), nullptr);
        bool good = en["index"] == i && en["code_a"] == ca && en["code_b"] == cb && same_value(got, want) &&
                    same_value(static_cast<double>(std::bit_cast<float>(en["f32_bits"].get<std::uint32_t>())), want);
        if (integer) good = good && std::ldexp(static_cast<double>(en["k"].get<std::int64_t>()), e) == want;
        // csv row: index,code_a,code_b,value,f32_bits,k
        std::getline(csv, line);
        std::vector<std::string> col;
        std::stringstream ls(line);
        for (std::string c; std::getline(ls, c, ',');) col.push_back(c);
        if (col.size() == 5) col.push_back("");
        good = good && col.size() == 6 && std::stoul(col[0]) == i &&
               same_value(col[3].empty() ? NAN : std::strtod(col[3].c_str(), nullptr), want) &&
               (!integer || std::ldexp(static_cast<double>(std::stoll(col[5])), e) == want);
        if (!good && !bad++) first = fmt::format("entry {}: json {} csv {} want {}", i, en.dump(), line, want);
      }
    CHECK_MESSAGE(bad == 0, first);
    CHECK(!std::getline(csv, line));
  }
}
