// Minifloat encode/decode: the arithmetic encoder against the exact value
// table across the whole parameter space, and IEEE 754 overflow rules.
#include <doctest/doctest.h>

#include <bit>
#include <cmath>
#include <random>

#include "lobit/error.hpp"
#include "lobit/format/minifloat.hpp"
#include "lobit/format/value_table.hpp"
#include "test_util.hpp"

using namespace lobit;
using lobit::test::fmt;
using lobit::test::same_value;

namespace {

std::vector<MinifloatParams> sweep_params(int max_bits) {
  std::vector<MinifloatParams> out;
  for (int e = 0; e <= 5; ++e)
    for (int m = 0; m <= 6; ++m)
      for (int sign = 0; sign <= 1; ++sign)
        for (int sub = 0; sub <= 1; ++sub)
          for (auto sp : {SpecialValues::ieee, SpecialValues::top_nan, SpecialValues::neg_zero_nan, SpecialValues::none})
            for (int dbias : {0, -2, 3}) {
              if (sign + e + m > max_bits || sign + e + m < 2) continue;
              MinifloatParams p{e, m, MinifloatParams::default_bias(e, sp) + dbias, sign == 1, sub == 1, sp};
              try {
                Minifloat f(p);
                out.push_back(p);
              } catch (const Error&) {
                // impossible combination (e.g. ieee without exponent bits)
              }
            }
  return out;
}

// Inputs that exercise every decision: each value, each threshold and its
// binary64 neighbours, points beyond both ends, random doubles in range.
std::vector<double> probe_inputs(const ValueTable& t, std::mt19937_64& rng) {
  std::vector<double> xs;
  auto add_around = [&](double x) {
    xs.push_back(x);
    xs.push_back(std::nextafter(x, -INFINITY));
    xs.push_back(std::nextafter(x, INFINITY));
  };
  for (double v : t.values()) add_around(v);
  for (const auto& th : t.thresholds()) add_around(th.nearest);
  for (const auto* o : {&t.upper_overflow(), &t.lower_overflow()})
    if (*o) add_around((*o)->nearest);
  const double top = std::max(std::fabs(t.values().front()), std::fabs(t.values().back()));
  for (double k : {1.5, 2.0, 4.0, 1e10}) xs.push_back(top * k), xs.push_back(-top * k);
  xs.push_back(INFINITY);
  xs.push_back(-INFINITY);
  xs.push_back(0.0);
  xs.push_back(-0.0);
  xs.push_back(1e-300);
  xs.push_back(-1e-300);
  std::uniform_real_distribution<double> u(-1.2 * top, 1.2 * top);
  for (int i = 0; i < 200; ++i) xs.push_back(u(rng));
  return xs;
}

}  // namespace

TEST_CASE("arithmetic encoder equals the exact value table for every minifloat up to 10 bits") {
  std::mt19937_64 rng(20261201);
  const auto params = sweep_params(10);
  CHECK(params.size() > 500);
  std::size_t checked = 0;
  for (const auto& p : params) {
    const Minifloat f(p);
    const ValueTable t(f);
    INFO("format ", f.spec());
    const auto xs = probe_inputs(t, rng);
    for (Rounding r : lobit::test::all_roundings)
      for (Overflow o : {Overflow::saturate, Overflow::special})
        for (double x : xs) {
          const std::uint32_t w = static_cast<std::uint32_t>(rng());
          if (std::isnan(x)) continue;
          const Code a = f.encode(x, r, o, w);
          const Code b = t.encode(x, r, o, w);
          if (a != b) {
            FAIL_CHECK("x=", x, " (", std::bit_cast<std::uint64_t>(x), ") rounding ", to_string(r), " overflow ",
                       to_string(o), " arithmetic ", a, " table ", b);
          }
          ++checked;
        }
  }
  MESSAGE("compared ", checked, " encodes");
}

TEST_CASE("decode(encode(decode(c))) is the identity on every finite code of every minifloat up to 12 bits") {
  for (const auto& p : sweep_params(12)) {
    const Minifloat f(p);
    INFO("format ", f.spec());
    for (Code c = 0; c <= f.code_count_minus_one(); ++c) {
      const CodeClass k = f.classify(c);
      if (!lobit::test::is_finite_class(k) && k != CodeClass::infinity) continue;
      const double v = f.decode(c);
      for (Rounding r : lobit::test::all_roundings) {
        const Code back = f.encode(v, r, Overflow::special, 0xdeadbeef);
        CHECK(same_value(f.decode(back), v));
      }
    }
  }
}

// IEEE 754-2019 section 7.4 (overflow) and OCP OFP8 rev. 1.0 (E5M2 follows
// IEEE; E4M3 saturating and non-saturating conversion). (from memory)
TEST_CASE("overflow thresholds per rounding mode follow IEEE 754") {
  auto e5m2 = fmt("e5m2");
  CHECK(e5m2->encode(61440) == 0x7c);                         // max + half spacing ties to even: +inf
  CHECK(e5m2->encode(std::nextafter(61440.0, 0)) == 0x7b);    // just below: 57344
  CHECK(e5m2->encode(-61440) == 0xfc);
  CHECK(e5m2->encode(61440, Rounding::nearest_away) == 0x7c);
  CHECK(e5m2->encode(1e6, Rounding::toward_zero) == 0x7b);    // toward zero: max finite
  CHECK(e5m2->encode(57345, Rounding::up) == 0x7c);           // up: +inf
  CHECK(e5m2->encode(-57345, Rounding::up) == 0xfb);          // up, negative: -max
  CHECK(e5m2->encode(-57345, Rounding::down) == 0xfc);        // down, negative: -inf
  CHECK(e5m2->encode(57345, Rounding::down) == 0x7b);
  CHECK(e5m2->encode(61440, Rounding::nearest_even, Overflow::saturate) == 0x7b);
  CHECK(e5m2->encode(INFINITY) == 0x7c);                       // infinity is exact
  CHECK(e5m2->encode(INFINITY, Rounding::toward_zero) == 0x7c);
  CHECK(e5m2->encode(INFINITY, Rounding::nearest_even, Overflow::saturate) == 0x7b);

  auto fp16 = fmt("fp16");
  CHECK(fp16->encode(65520) == 0x7c00);  // binary16 overflows from 65520 (IEEE 754 section 7.4)
  CHECK(fp16->encode(std::nextafter(65520.0, 0)) == 0x7bff);
  CHECK(fp16->encode(65504) == 0x7bff);

  auto e4m3 = fmt("e4m3");
  CHECK(e4m3->encode(464) == 0x7e);  // 464 = 448 + 16 ties to the even code 448 (OCP OFP8)
  CHECK(e4m3->encode(std::nextafter(464.0, INFINITY)) == 0x7e);  // default for E4M3: saturate
  CHECK(e4m3->encode(std::nextafter(464.0, INFINITY), Rounding::nearest_even, Overflow::special) == 0x7f);  // NaN
  CHECK(e4m3->encode(464, Rounding::nearest_even, Overflow::special) == 0x7e);
  CHECK(e4m3->encode(-1000, Rounding::nearest_even, Overflow::special) == 0x7f);  // the NaN code
  CHECK(e4m3->encode(-1000) == 0xfe);
  CHECK(e4m3->encode(INFINITY, Rounding::nearest_even, Overflow::special) == 0x7f);
  CHECK(e4m3->encode(NAN) == 0x7f);

  auto e2m1 = fmt("e2m1");  // no special value at all: every overflow saturates
  CHECK(e2m1->encode(7.0, Rounding::nearest_even, Overflow::special) == 0x7);
  CHECK(e2m1->encode(-1e30, Rounding::down, Overflow::special) == 0xf);
  CHECK_THROWS_AS(e2m1->encode(NAN), Error);
}

TEST_CASE("fp32 and fp64 encodes agree with the compiler's conversions") {
  // reference: the compiler's double -> float conversion (IEEE 754 section 5.4.2, roundTiesToEven)
  auto fp32 = fmt("fp32");
  auto fp64 = fmt("fp64");
  std::mt19937_64 rng(7);
  for (int i = 0; i < 200000; ++i) {
    double x = std::bit_cast<double>(rng());
    if (std::isnan(x)) continue;
    if (i % 2) x = std::ldexp(std::uniform_real_distribution<double>(1, 2)(rng), static_cast<int>(rng() % 300) - 160);
    const float ref = static_cast<float>(x);
    CHECK(fp32->encode(x) == std::bit_cast<std::uint32_t>(ref));
    CHECK(fp64->encode(x) == std::bit_cast<std::uint64_t>(x));
    CHECK(same_value(fp64->decode(std::bit_cast<std::uint64_t>(x)), x));
  }
}

TEST_CASE("ties go to the even code, or away from zero under nearest-away") {
  auto e2m1 = fmt("e2m1");  // values 0, 0.5, 1, 1.5, 2, 3, 4, 6
  CHECK(e2m1->decode(e2m1->encode(0.25)) == 0.0);   // 0 (code 0) vs 0.5 (code 1)
  CHECK(e2m1->decode(e2m1->encode(0.75)) == 1.0);
  CHECK(e2m1->decode(e2m1->encode(1.25)) == 1.0);
  CHECK(e2m1->decode(e2m1->encode(2.5)) == 2.0);
  CHECK(e2m1->decode(e2m1->encode(5.0)) == 4.0);
  CHECK(e2m1->decode(e2m1->encode(-2.5)) == -2.0);
  CHECK(e2m1->decode(e2m1->encode(0.25, Rounding::nearest_away)) == 0.5);
  CHECK(e2m1->decode(e2m1->encode(5.0, Rounding::nearest_away)) == 6.0);
  CHECK(e2m1->decode(e2m1->encode(-2.5, Rounding::nearest_away)) == -3.0);
  // Without subnormals both 0 and the smallest normal have even codes: the tie goes to zero.
  auto flush = fmt("e2m1+subnormals=no");
  CHECK(flush->decode(flush->encode(0.5)) == 0.0);
  CHECK(flush->decode(flush->encode(std::nextafter(0.5, 1))) == 1.0);
  CHECK(flush->decode(flush->encode(0.5, Rounding::nearest_away)) == 1.0);
  // M = 0: ties between 2^k and 2^(k+1) go to the even exponent field.
  auto e3m0 = fmt("e3m0+special=none");  // bias 3: field f holds 2^(f-3)
  CHECK(e3m0->encode(1.5) == 0x4);  // 1 (field 3) vs 2 (field 4): to field 4
  CHECK(e3m0->encode(3.0) == 0x4);  // 2 (field 4) vs 4 (field 5): to field 4
}

TEST_CASE("stochastic rounding follows its bit-exact definition") {
  auto e2m1 = fmt("e2m1");
  // 1.25 lies halfway between 1.0 and 1.5: remainder fraction 0.5 -> t = 2^31.
  CHECK(e2m1->encode(1.25, Rounding::stochastic, Overflow::format_default, 0x7fffffff) == 0x2);
  CHECK(e2m1->encode(1.25, Rounding::stochastic, Overflow::format_default, 0x80000000) == 0x3);
  // 1.125: fraction 0.25 -> t = 2^30; rounds up from R = 3 * 2^30.
  CHECK(e2m1->encode(1.125, Rounding::stochastic, Overflow::format_default, 0xbfffffff) == 0x2);
  CHECK(e2m1->encode(1.125, Rounding::stochastic, Overflow::format_default, 0xc0000000) == 0x3);
  // Negative inputs round in magnitude.
  CHECK(e2m1->encode(-1.125, Rounding::stochastic, Overflow::format_default, 0xc0000000) == 0xb);
  // Exact values never move.
  CHECK(e2m1->encode(1.5, Rounding::stochastic, Overflow::format_default, 0xffffffff) == 0x3);
  // Unbiased on average (a statistical check with a fixed seed: 10^5 draws).
  std::mt19937 rng(11);
  const double x = 2.3;  // between 2 and 3
  double sum = 0;
  const int n = 100000;
  for (int i = 0; i < n; ++i) sum += e2m1->decode(e2m1->encode(x, Rounding::stochastic, Overflow::format_default, rng()));
  CHECK(std::fabs(sum / n - x) < 0.005);  // standard error ~0.0014
}

TEST_CASE("impossible parameters are refused with a hint") {
  CHECK_THROWS_AS(Minifloat({.exp_bits = 12, .man_bits = 3}), Error);
  CHECK_THROWS_AS(Minifloat({.exp_bits = 4, .man_bits = 53}), Error);
  CHECK_THROWS_AS(Minifloat({.exp_bits = 4, .man_bits = 3, .bias = 2000}), Error);
  CHECK_THROWS_AS(Minifloat({.exp_bits = 0, .man_bits = 3, .bias = 0, .special = SpecialValues::ieee}), Error);
  CHECK_THROWS_AS(Minifloat({.exp_bits = 3, .man_bits = 2, .bias = 3, .sign = false, .special = SpecialValues::neg_zero_nan}), Error);
  try {
    Minifloat({.exp_bits = 5, .man_bits = 2, .bias = -1100, .special = SpecialValues::ieee});
    FAIL("expected an error");
  } catch (const Error& e) {
    CHECK(e.hint().find("bias between") != std::string::npos);
  }
}

TEST_CASE("unsigned minifloats clamp negative inputs to zero") {
  auto u = fmt("e4m3+sign=no");
  CHECK(u->bits() == 7);
  CHECK(u->encode(-3.0) == 0);
  CHECK(u->encode(-0.0) == 0);
  CHECK(u->decode(u->encode(448.0)) == 448.0);
  CHECK(u->encode(-3.0, Rounding::down, Overflow::special) == *u->nan_code());
}
