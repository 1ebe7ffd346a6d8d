// `lobit lut` output compiled and run: for every element preset of up to 16 bits
// and a sweep of parameterised formats, the C and C++ headers are compiled with
// the system compilers (no fast-math, no contraction, warnings as errors) into a
// shared object, loaded, and compared with the library bit for bit: decode on
// every code, encode on every boundary input and 2^20 random float32 per format,
// pack/unpack on random code streams of odd lengths.
#include <doctest/doctest.h>

#include <chrono>
#include <set>
#include <thread>

#include "lobit/error.hpp"

#include "lut_harness.hpp"
#include "test_util.hpp"

using namespace lobit;
using namespace lobit::test;

namespace {

constexpr std::size_t random_inputs = std::size_t{1} << 20;  // >= 10^6 per format

// Codebooks whose values float32 cannot all hold: the generator must say so.
const std::set<std::string> expected_inexact = {
    "codebook+values=-0.3/0.1/0.7", "codebook+values=-1e300/-1e-300/0/1e-300/1e300",
    "codebook+values=0/1.000000059604644775390625/1.000000178813934326171875/2"};

struct Lang {
  emit::LutLanguage language;
  bool cxx;
};

// Builds the cases for one language: C uses the default overflow, lo-first and f32;
// C++ the other overflow policy (where it differs), hi-first and the narrowest exact type.
std::vector<LutCase> make_cases(bool cxx) {
  std::vector<LutCase> cases;
  const auto specs = element_sweep_specs();
  for (std::size_t i = 0; i < specs.size(); ++i) {
    LutCase c;
    c.spec = specs[i];
    c.f = parse_element(c.spec);
    c.opt.language = cxx ? emit::LutLanguage::cpp : emit::LutLanguage::c;
    c.opt.cpp_namespace = "lobit_test::gen";
    c.opt.stem = emit::lut_identifier_stem(fmt::format("t{}_{}", i, c.spec));
    c.opt.title = c.spec;
    c.opt.command = "lut_test " + c.spec;
    // Formats whose values float32 cannot all hold (beyond its range or precision) are generated with
    // allow_inexact; the codebooks marked so must be among them.
    c.opt.allow_inexact = !emit::decode_table(*c.f, emit::DecodeType::f32).exact;
    if (expected_inexact.count(c.spec)) CHECK_MESSAGE(c.opt.allow_inexact, c.spec);
    if (cxx) {
      const bool specials = c.f->has_infinity() || c.f->nan_code();
      c.opt.overflow = specials ? (c.f->resolve(Overflow::format_default) == Overflow::saturate ? Overflow::special
                                                                                                 : Overflow::saturate)
                                : Overflow::format_default;
      c.opt.pack = emit::PackOrder::hi_first;
      if (emit::decode_table(*c.f, emit::DecodeType::f16).exact) c.opt.decode_type = emit::DecodeType::f16;
      else if (emit::decode_table(*c.f, emit::DecodeType::bf16).exact) c.opt.decode_type = emit::DecodeType::bf16;
    }
    cases.push_back(std::move(c));
  }
  return cases;
}

void run_language(bool cxx) {
  const auto t0 = std::chrono::steady_clock::now();
  const auto cases = make_cases(cxx);
  const auto dir = work_dir(cxx ? "cpp" : "c");
  std::vector<std::string> headers;
  for (const auto& c : cases) {
    const std::string h = (dir / (c.opt.stem + (cxx ? ".hpp" : ".h"))).string();
    const std::string text = emit::emit_lut(*c.f, c.opt);
    REQUIRE_MESSAGE(text == emit::emit_lut(*c.f, c.opt), "output not deterministic for ", c.spec);
    write_text(h, text);
    headers.push_back(h);
  }
  const auto src = dir / (cxx ? "wrapper.cpp" : "wrapper.c");
  write_text(src, wrapper_source(cases, headers, cxx, "lobit_test::gen"));
  std::string log;
  const Loaded l = cxx ? compile_and_load(LOBIT_TEST_CXX_COMPILER, "-std=c++17", src, dir / "wrapper.so", log)
                       : compile_and_load(LOBIT_TEST_C_COMPILER, "-std=c99", src, dir / "wrapper.so", log);
  REQUIRE_MESSAGE(l.entries != nullptr, "compiling the generated code failed:\n", log.substr(0, 4000));
  REQUIRE(l.count == cases.size());
  const auto t1 = std::chrono::steady_clock::now();
  Tally tally;
  for (std::size_t k = 0; k < cases.size(); ++k) {
    REQUIRE(std::string(l.entries[k].name) == cases[k].opt.stem);
    check_case(cases[k], l.entries[k], tally, random_inputs);
  }
  const auto t2 = std::chrono::steady_clock::now();
  MESSAGE(fmt::format("{}: {} formats; generate+compile {:.1f} s, compare {:.1f} s; {} codes decoded, {} inputs encoded, "
                      "{} codes packed",
                      cxx ? "C++17" : "C99", cases.size(), std::chrono::duration<double>(t1 - t0).count(),
                      std::chrono::duration<double>(t2 - t1).count(), tally.decode_checked, tally.encode_checked,
                      tally.pack_checked));
  dlclose(l.handle);
}

}  // namespace

TEST_CASE("generated C99 headers match the library bit for bit") { run_language(false); }
TEST_CASE("generated C++17 headers match the library bit for bit") { run_language(true); }

TEST_CASE("encode plan: outside checks on a few known formats") {
  // OCP OFP8 spec (v1.0, section 5.3): E4M3 max normal 448; under non-saturating conversion values past
  // 448 + 16 (the half spacing to the virtual 480) become NaN; 464 itself is a tie and goes to 448 (even code).
  const auto e4m3 = parse_element("e4m3");
  const auto p = emit::plan_encode(*e4m3, Overflow::special);
  REQUIRE(!p.thresholds.empty());
  const auto& top = p.thresholds.back();
  CHECK(top.overflow);
  CHECK(std::bit_cast<float>(top.up_from_bits) == std::nextafter(464.0f, INFINITY));
  CHECK(p.slot_codes.back() == 0x7f);  // the NaN code of E4M3 (S.1111.111, OCP OFP8 table 1)
  CHECK(p.nan_from_library);
  // IEEE 754 binary16: 65520 (max 65504 + half a spacing of 32) is a tie that overflows to infinity (from memory).
  const auto fp16 = parse_element("fp16");
  const auto q = emit::plan_encode(*fp16, Overflow::special);
  CHECK(std::bit_cast<float>(q.thresholds.back().up_from_bits) == 65520.0f);
  CHECK(q.slot_codes.back() == 0x7c00);  // +inf in binary16 (IEEE 754-2019 section 3.4)
  // e2m1 (OCP MX v1.0, section 5.3.3): values 0, 0.5, 1, 1.5, 2, 3, 4, 6; no NaN: the documented NaN result is +0's code.
  const auto e2m1 = parse_element("e2m1");
  const auto r = emit::plan_encode(*e2m1, Overflow::format_default);
  CHECK(!r.nan_from_library);
  CHECK(r.nan_result == 0);
  CHECK(r.negative_zero_code == Code{8});
}

TEST_CASE("lut refuses what it cannot do") {
  emit::LutOptions o;
  CHECK_THROWS_AS(emit::emit_lut(*parse_element("fp32"), o), Error);
  o.decode_type = emit::DecodeType::f16;
  CHECK_THROWS_AS(emit::emit_lut(*parse_element("bf16"), o), Error);  // bf16 max 3.39e38 is far past binary16
  o.allow_inexact = true;
  const std::string text = emit::emit_lut(*parse_element("bf16"), o);
  CHECK(text.find("INEXACT") != std::string::npos);
  o = {};
  o.language = emit::LutLanguage::cpp;
  o.cpp_namespace = "9bad";
  CHECK_THROWS_AS(emit::emit_lut(*parse_element("e2m1"), o), Error);
  o.cpp_namespace = "a::b_c";
  CHECK_NOTHROW(emit::emit_lut(*parse_element("e2m1"), o));
}

TEST_CASE("json and csv outputs carry every code and threshold") {
  emit::LutOptions o;
  o.language = emit::LutLanguage::json;
  const auto f = parse_element("e2m1");
  const std::string j = emit::emit_lut(*f, o);
  CHECK(j == emit::emit_lut(*f, o));
  std::size_t codes = 0, pos = 0;
  while ((pos = j.find("\"code\":", pos)) != std::string::npos) ++codes, ++pos;
  CHECK(codes == 16);
  o.language = emit::LutLanguage::csv;
  const std::string c = emit::emit_lut(*f, o);
  CHECK(std::count(c.begin(), c.end(), '\n') == 1 + 16 + 16);  // header, 16 codes, 14 midpoints + 2 overflow
}
