// `lobit lut --decode-type int`: the scaled-integer decode table (value = k * 2^E)
// compiled as C99, C++17 and CUDA (as host C++) and run: k * 2^E equals the library's decode for every
// finite code of every format that has such a table (presets of up to 16 bits and a
// sweep), the NaN / infinity / unused codes are flagged, and formats without such a
// table are refused, checked against an independent search for E and k.
#include <doctest/doctest.h>

#include "lobit/error.hpp"
#include "lut_harness.hpp"

using namespace lobit;
using namespace lobit::test;

namespace {

std::vector<std::string> int_specs() {
  std::vector<std::string> s;
  for (const auto& p : presets()) {
    if (p.scaled()) continue;
    if (parse_element(p.name)->bits() > 16) continue;
    s.push_back(p.name);
  }
  for (const char* sp : {"float+exp=2+man=1+sign=no+special=none", "float+exp=3+man=2+subnormals=no+special=ieee",
                         "float+exp=4+man=3+bias=7+special=top-nan", "float+exp=5+man=2+special=ieee", "int+bits=12",
                         "int+bits=16", "int+bits=16+signed=no", "int+bits=9+frac=3+range=symmetric", "int+bits=8+frac=0+signed=no",
                         "pow2+exp=3+bias=3", "pow2+exp=4+bias=7+zero=no", "pow2+exp=5+bias=15+sign=no+nan=yes",
                         "codebook+values=-3/-1/1/3", "codebook+values=-0.3/0.1/0.7", "codebook+values=0/0.25/40000",
                         "normal-quantile+bits=3"})
    s.push_back(sp);
  return s;
}

// Independent: the largest E with every finite value an integer multiple of 2^E (scanning down from 2^1100),
// then whether every k fits a signed (or, with no negative value, unsigned) 32-bit integer.
struct Expect {
  bool exists = false;
  int exponent = 0;
  bool is_signed = false;
};
Expect expect(const ElementFormat& f) {
  const Code n = Code{1} << f.bits();
  std::vector<double> v;
  for (Code c = 0; c < n; ++c) {
    const CodeClass k = f.classify(c);
    if (k == CodeClass::zero || k == CodeClass::subnormal || k == CodeClass::normal) v.push_back(f.decode(c));
  }
  Expect e;
  int E = 1100;
  auto all_integer = [&](int x) {
    for (double y : v) {
      const double k = std::ldexp(y, -x);  // 0 for y != 0: underflow, not an integer multiple
      if (y != 0 && (k == 0 || k != std::trunc(k))) return false;
    }
    return true;
  };
  while (!all_integer(E)) --E;
  bool neg = false;
  double lo = 0, hi = 0;
  for (double y : v) {
    const double k = std::ldexp(y, -E);
    neg = neg || k < 0;
    lo = std::min(lo, k);
    hi = std::max(hi, k);
  }
  e.exponent = E;
  e.is_signed = neg;
  e.exists = std::isfinite(lo) && std::isfinite(hi) &&
             (neg ? lo >= -0x1p31 && hi <= 0x1p31 - 1 : hi <= 0x1p32 - 1);
  if (v.size() == 1 && v[0] == 0) e.exponent = 0;
  return e;
}

}  // namespace

TEST_CASE("scaled-integer decode tables: k * 2^E equals the library's decode (C99, C++17, CUDA as host C++)") {
  std::size_t made = 0, refused = 0, checked = 0;
  for (const auto lang : {emit::LutLanguage::c, emit::LutLanguage::cpp, emit::LutLanguage::cuda}) {
    const bool cxx = lang != emit::LutLanguage::c;
    const auto dir = work_dir(std::string("int_") + std::string(emit::to_string(lang)));
    std::string src;
    std::vector<std::pair<std::string, std::shared_ptr<const ElementFormat>>> ok;
    const auto specs = int_specs();
    for (std::size_t i = 0; i < specs.size(); ++i) {
      const auto f = parse_element(specs[i]);
      INFO("format ", specs[i]);
      const Expect e = expect(*f);
      emit::LutOptions o;
      o.language = lang;
      o.cpp_namespace = "lobit_int_test";
      o.decode_type = emit::DecodeType::scaled_int;
      o.stem = emit::lut_identifier_stem(fmt::format("k{}_{}", i, specs[i]));
      o.command = "lut_scaled_int_test " + specs[i];
      if (!e.exists) {
        CHECK_THROWS_AS(emit::emit_lut(*f, o), Error);
        ++refused;
        continue;
      }
      std::string text;
      CHECK_NOTHROW(text = emit::emit_lut(*f, o));
      if (text.empty()) continue;
      const auto t = emit::scaled_int_table(*f);
      CHECK(t.exponent == e.exponent);
      CHECK(t.is_signed == e.is_signed);
      const std::string h = (dir / (o.stem + (cxx ? ".hpp" : ".h"))).string();  // .hpp for the cuda header too
      write_text(h, text);
      src += "#include \"" + h + "\"\n";
      ok.emplace_back(o.stem, f);
      ++made;
    }
    const std::string q = cxx ? "lobit_int_test::" : "";
    const std::string ext = cxx ? "extern \"C\" " : "";
    for (std::size_t k = 0; k < ok.size(); ++k) {
      std::string M = "LOBIT_";
      for (char ch : ok[k].first) M += static_cast<char>(std::toupper(static_cast<unsigned char>(ch)));
      src += fmt::format("static long long k_{}(uint32_t c) {{ return (long long){}lobit_{}_decode_k_of(c); }}\n", k, q, ok[k].first);
      src += fmt::format("static int e_{}(void) {{ return {}_DECODE_EXPONENT; }}\n", k, M);
    }
    src += "typedef struct { long long (*k)(uint32_t); int (*e)(void); } lobit_int_entry;\n";
    src += ext + "const lobit_int_entry lobit_int_entries[] = {\n";
    for (std::size_t k = 0; k < ok.size(); ++k) src += fmt::format("  {{k_{}, e_{}}},\n", k, k);
    src += "};\n";
    const auto file = dir / (cxx ? "wrapper.cpp" : "wrapper.c");
    write_text(file, src);
    std::string log;
    const Loaded l = cxx ? compile_and_load(LOBIT_TEST_CXX_COMPILER, "-std=c++17", file, dir / "wrapper.so", log)
                         : compile_and_load(LOBIT_TEST_C_COMPILER, "-std=c99", file, dir / "wrapper.so", log);
    REQUIRE_MESSAGE(l.handle != nullptr, "compiling the generated code failed:\n", log.substr(0, 4000));
    struct Entry {
      long long (*k)(std::uint32_t);
      int (*e)();
    };
    const auto* entries = static_cast<const Entry*>(dlsym(l.handle, "lobit_int_entries"));
    REQUIRE(entries != nullptr);
    for (std::size_t k = 0; k < ok.size(); ++k) {
      const ElementFormat& f = *ok[k].second;
      INFO("format ", f.spec());
      const int E = entries[k].e();
      std::size_t bad = 0;
      std::string first;
      for (Code c = 0; c < (Code{1} << f.bits()); ++c) {
        const CodeClass cl = f.classify(c);
        const long long kk = entries[k].k(static_cast<std::uint32_t>(c));
        const bool number = cl == CodeClass::zero || cl == CodeClass::subnormal || cl == CodeClass::normal;
        const double got = std::ldexp(static_cast<double>(kk), E);
        const bool good = number ? got == f.decode(c) : kk == 0;  // -0 decodes as k = 0 (== compares equal)
        if (!good && !bad++) first = fmt::format("code {:#x}: k {} * 2^{} vs library {}", c, kk, E, f.decode(c));
        ++checked;
      }
      CHECK_MESSAGE(bad == 0, first);
    }
    dlclose(l.handle);
  }
  MESSAGE(fmt::format("{} tables generated and checked ({} codes), {} refusals", made, checked, refused));
  CHECK(made > 0);
  CHECK(refused > 0);
}

TEST_CASE("scaled-integer decode: outside checks") {
  // OCP MX v1.0 section 5.3.3: e2m1 values 0, 0.5, 1, 1.5, 2, 3, 4, 6 -> k = 0, 1, 2, 3, 4, 6, 8, 12 with E = -1.
  const auto t = emit::scaled_int_table(*parse_element("e2m1"));
  CHECK(t.exponent == -1);
  const std::vector<std::int64_t> want = {0, 1, 2, 3, 4, 6, 8, 12};
  for (std::size_t c = 0; c < 8; ++c) {
    CHECK(t.k[c] == want[c]);
    CHECK(t.k[c + 8] == -want[c]);
  }
  CHECK(t.type_bits == 8);
  CHECK(t.is_signed);
  // int4: two's complement -8..7 (common practice), E = 0; int8-frac6: step 2^-6 (the preset's fixed point, frac=6).
  const auto i4 = emit::scaled_int_table(*parse_element("int4"));
  CHECK(i4.exponent == 0);
  CHECK(i4.k[0x8] == -8);
  CHECK(i4.k[0x7] == 7);
  CHECK(emit::scaled_int_table(*parse_element("int8-frac6")).exponent == -6);
  // e5m2 (OCP OFP8 v1.0, section 5.3.2): smallest subnormal 2^-16, max 57344, so k = 57344 * 2^16 = 3758096384,
  // past 2^31 - 1: refused. 0.1 is not a short dyadic (its binary64 significand has 53 bits, from memory): refused.
  CHECK_THROWS_AS(emit::scaled_int_table(*parse_element("e5m2")), Error);
  CHECK_THROWS_AS(emit::scaled_int_table(*parse_element("codebook+values=-1/0.1/1")), Error);
  emit::LutOptions o;
  o.decode_type = emit::DecodeType::scaled_int;
  CHECK_THROWS_AS(emit::emit_lut(*parse_element("e5m2"), o), Error);
  o.language = emit::LutLanguage::json;
  CHECK_THROWS_AS(emit::emit_lut(*parse_element("e2m1"), o), Error);
}
