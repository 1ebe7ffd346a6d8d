// `lobit lut --stochastic`: the generated lobit_NAME_encode_stochastic(x, r), compiled
// as C99, C++17 and CUDA-as-host-C++ and run, against the library's
// ElementFormat::encode(double(x), Rounding::stochastic, overflow, r), bit for bit:
// every element preset of up to 16 bits and a sweep of parameterised formats,
// 2^20 random (input, word) pairs per format (C; fewer for the other languages,
// which share the generator path) plus every boundary input with the words
// 0, 2^31 - 1, 2^31, 2^32 - 1, and words placed on each side of the decision
// t + r = 2^32.
#include <doctest/doctest.h>

#include <chrono>
#include <thread>

#include "lobit/error.hpp"
#include "lobit/format/bulk.hpp"
#include "lut_harness.hpp"

using namespace lobit;
using namespace lobit::test;

namespace {


struct SrCase {
  std::string spec;
  std::shared_ptr<const ElementFormat> f;
  emit::LutOptions opt;
};

using SrFn = void (*)(const float*, const std::uint32_t*, std::size_t, std::uint16_t*);

std::vector<SrCase> make_cases(emit::LutLanguage lang, const std::vector<std::string>& specs) {
  std::vector<SrCase> cases;
  for (std::size_t i = 0; i < specs.size(); ++i) {
    SrCase c;
    c.spec = specs[i];
    c.f = parse_element(c.spec);
    c.opt.language = lang;
    c.opt.cpp_namespace = "lobit_sr_test";
    c.opt.stem = emit::lut_identifier_stem(fmt::format("s{}_{}", i, c.spec));
    c.opt.title = c.spec;
    c.opt.command = "lut_stochastic_test " + c.spec;
    c.opt.stochastic = true;
    c.opt.allow_inexact = !emit::decode_table(*c.f, emit::DecodeType::f32).exact;
    if (lang != emit::LutLanguage::c) {
      // The other overflow policy where it makes a difference.
      const bool specials = c.f->has_infinity() || c.f->nan_code();
      if (specials)
        c.opt.overflow = c.f->resolve(Overflow::format_default) == Overflow::saturate ? Overflow::special : Overflow::saturate;
    }
    cases.push_back(std::move(c));
  }
  return cases;
}

// The library's answer; for NaN where the format has no NaN code the documented fallback (the code +0.0
// encodes to under nearest-even, as the nearest encoder does).
Code library_sr(const ElementFormat& f, float x, Overflow o, std::uint32_t r) {
  if (std::isnan(x) && !f.nan_code()) return f.encode(0.0, Rounding::nearest_even, o);
  return f.encode(static_cast<double>(x), Rounding::stochastic, o, r);
}

// t of the README definition (value-table form), for placing words on both sides of t + r = 2^32.
// Only steers the choice of inputs; the expected codes come from the library.
std::optional<std::uint32_t> reference_t(const std::vector<double>& vals, std::optional<double> uv, double x) {
  if (!std::isfinite(x)) return std::nullopt;
  double a, b;
  if (x > vals.back()) {
    if (!uv || x >= *uv) return std::nullopt;
    a = vals.back(), b = *uv;
  } else if (x < vals.front()) {
    if (!uv || x <= -*uv) return std::nullopt;
    a = vals.front(), b = -*uv;
  } else {
    auto it = std::upper_bound(vals.begin(), vals.end(), x);
    if (it == vals.end() || it == vals.begin() || *(it - 1) == x) return std::nullopt;
    const double lo = *(it - 1), hi = *it;
    if (lo >= 0) a = lo, b = hi;
    else if (hi <= 0) a = hi, b = lo;
    else return std::nullopt;
  }
  const double t = std::floor(std::ldexp((std::fabs(x) - std::fabs(a)) / (std::fabs(b) - std::fabs(a)), 32));
  if (!(t > 0)) return 0u;
  return t >= 4294967295.0 ? 0xffffffffu : static_cast<std::uint32_t>(t);
}

void build_inputs(const SrCase& c, std::size_t random_count, std::vector<float>& x, std::vector<std::uint32_t>& r) {
  const ElementFormat& f = *c.f;
  const auto in = encode_inputs(f, c.opt.overflow, 0, 0);  // boundaries only
  std::vector<float> bnd = in;
  const ValueTable vt(f);
  std::optional<double> uv;
  if (auto vn = f.virtual_next_above_max()) uv = vn->value;
  if (uv) {
    float v = static_cast<float>(*uv);
    for (int s : {1, -1})
      for (float w : {v, std::nextafter(v, INFINITY), std::nextafter(v, 0.0f)}) bnd.push_back(s * w);
  }
  for (float b : bnd)
    for (std::uint32_t w : {0u, 0x7fffffffu, 0x80000000u, 0xffffffffu, 1u}) x.push_back(b), r.push_back(w);
  // Random inputs (the harness's mix: bit patterns, uniform over +-1.25 max, log-uniform magnitudes) with
  // random words; every third word sits on one side of the decision t + r = 2^32.
  const auto rnd = encode_inputs(f, c.opt.overflow, random_count, 0x5700 + f.bits());
  std::mt19937_64 rng(0x5eedu + f.bits());
  for (std::size_t i = in.size(); i < rnd.size(); ++i) {
    std::uint32_t w = stochastic_word(0x1234 + f.bits(), i);  // lobit/format/bulk.hpp: the CLI's word stream
    if (i % 3 == 0) {
      if (auto t = reference_t(vt.values(), uv, rnd[i]); t && *t > 0) {
        const std::uint64_t edge = (std::uint64_t{1} << 32) - *t;  // t + edge = 2^32: rounds away
        w = static_cast<std::uint32_t>((rng() & 1) ? edge : edge - 1);
      }
    }
    x.push_back(rnd[i]);
    r.push_back(w);
  }
}

struct Run {
  std::size_t formats = 0, pairs = 0;
  double compile_s = 0, compare_s = 0;
};

Run run(emit::LutLanguage lang, const std::vector<std::string>& specs, std::size_t random_count) {
  const bool c_lang = lang == emit::LutLanguage::c;
  const auto t0 = std::chrono::steady_clock::now();
  const auto cases = make_cases(lang, specs);
  const auto dir = work_dir(std::string("sr_") + std::string(emit::to_string(lang)));
  std::string src;
  for (const auto& c : cases) {
    const std::string h = (dir / (c.opt.stem + (c_lang ? ".h" : ".hpp"))).string();
    write_text(h, emit::emit_lut(*c.f, c.opt));
    src += "#include \"" + h + "\"\n";
  }
  const std::string q = c_lang ? "" : "lobit_sr_test::";
  for (std::size_t k = 0; k < cases.size(); ++k)
    src += fmt::format("static void sr_{}(const float* x, const uint32_t* r, size_t n, uint16_t* o) {{ size_t i; for (i = 0; i < n; ++i) "
                       "o[i] = {}lobit_{}_encode_stochastic(x[i], r[i]); }}\n", k, q, cases[k].opt.stem);
  const std::string ext = c_lang ? "" : "extern \"C\" ";
  src += ext + "const size_t lobit_sr_count = " + std::to_string(cases.size()) + ";\n";
  src += ext + "void (*const lobit_sr_entries[])(const float*, const uint32_t*, size_t, uint16_t*) = {\n";
  for (std::size_t k = 0; k < cases.size(); ++k) src += fmt::format("  sr_{},\n", k);
  src += "};\n";
  const auto file = dir / (c_lang ? "wrapper.c" : "wrapper.cpp");
  write_text(file, src);
  std::string log;
  const Loaded l = c_lang ? compile_and_load(LOBIT_TEST_C_COMPILER, "-std=c99", file, dir / "wrapper.so", log)
                          : compile_and_load(LOBIT_TEST_CXX_COMPILER, "-std=c++17", file, dir / "wrapper.so", log);
  REQUIRE_MESSAGE(l.handle != nullptr, "compiling the generated code failed:\n", log.substr(0, 4000));
  const auto* fns = static_cast<const SrFn*>(dlsym(l.handle, "lobit_sr_entries"));
  const auto* cnt = static_cast<const std::size_t*>(dlsym(l.handle, "lobit_sr_count"));
  REQUIRE(fns != nullptr);
  REQUIRE(cnt != nullptr);
  REQUIRE(*cnt == cases.size());
  const auto t1 = std::chrono::steady_clock::now();
  Run res;
  for (std::size_t k = 0; k < cases.size(); ++k) {
    const auto& c = cases[k];
    INFO("format ", c.spec, " (", emit::to_string(lang), "), overflow ", to_string(c.opt.overflow));
    std::vector<float> x;
    std::vector<std::uint32_t> r;
    build_inputs(c, random_count, x, r);
    std::vector<std::uint16_t> got(x.size()), want(x.size());
    fns[k](x.data(), r.data(), x.size(), got.data());
    auto work = [&](std::size_t lo, std::size_t hi) {
      for (std::size_t i = lo; i < hi; ++i) want[i] = static_cast<std::uint16_t>(library_sr(*c.f, x[i], c.opt.overflow, r[i]));
    };
    std::thread th(work, 0, x.size() / 2);
    work(x.size() / 2, x.size());
    th.join();
    std::size_t bad = 0;
    std::string first;
    for (std::size_t i = 0; i < x.size(); ++i)
      if (got[i] != want[i] && !bad++)
        first = fmt::format("input {:a} (bits {:#010x}), word {:#010x}: generated {:#x}, library {:#x}", static_cast<double>(x[i]),
                            std::bit_cast<std::uint32_t>(x[i]), r[i], got[i], want[i]);
    CHECK_MESSAGE(bad == 0, bad, " mismatches of ", x.size(), "; first ", first);
    res.pairs += x.size();
  }
  const auto t2 = std::chrono::steady_clock::now();
  res.formats = cases.size();
  res.compile_s = std::chrono::duration<double>(t1 - t0).count();
  res.compare_s = std::chrono::duration<double>(t2 - t1).count();
  MESSAGE(fmt::format("{}: {} formats, {} (input, word) pairs; generate+compile {:.1f} s, compare {:.1f} s", emit::to_string(lang),
                      res.formats, res.pairs, res.compile_s, res.compare_s));
  dlclose(l.handle);
  return res;
}

}  // namespace

TEST_CASE("generated C99 stochastic encoders match the library bit for bit") {
  const auto r = run(emit::LutLanguage::c, element_sweep_specs(), std::size_t{1} << 20);
  CHECK(r.pairs >= r.formats * 1000000);
}
TEST_CASE("generated C++17 stochastic encoders match the library (other overflow policy)") {
  run(emit::LutLanguage::cpp, element_sweep_specs(), std::size_t{1} << 15);
}
TEST_CASE("generated CUDA stochastic encoders, as host C++, match the library") {
  run(emit::LutLanguage::cuda, {"e2m1", "e4m3", "e5m2", "int4", "nf4", "e8m0", "fp16", "uint2"}, std::size_t{1} << 17);
}

TEST_CASE("stochastic: outside checks on e2m1") {
  // OCP MX v1.0 section 5.3.3: e2m1 values 0, 0.5, 1, 1.5, 2, 3, 4, 6 (1 is code 0x2, 1.5 is 0x3). x = 1.25 lies half
  // way between 1 and 1.5, so t = 2^31 (README, stochastic rounding): r = 2^31 - 1 keeps 1, r = 2^31 gives 1.5.
  emit::LutOptions o;
  o.stochastic = true;
  o.stem = "e2m1";
  const std::string h = emit::emit_lut(*parse_element("e2m1"), o);
  CHECK(h.find("lobit_e2m1_encode_stochastic(float x, uint32_t r)") != std::string::npos);
  const auto f = parse_element("e2m1");
  CHECK(f->encode(1.25, Rounding::stochastic, Overflow::format_default, 0x7fffffffu) == 0x2);
  CHECK(f->encode(1.25, Rounding::stochastic, Overflow::format_default, 0x80000000u) == 0x3);
  o.language = emit::LutLanguage::json;
  CHECK_THROWS_AS(emit::emit_lut(*f, o), Error);
}
