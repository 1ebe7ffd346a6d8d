// Minifloat encode/decode against GNU MPFR.
//
// For each format, rounding mode and overflow policy, Minifloat::encode followed
// by Minifloat::decode must give the value that MPFR gives when it rounds the
// same binary64 input to precision M+1 inside the format's exponent range with
// IEEE 754 subnormals emulated by mpfr_subnormalize, after a documented
// post-step for what MPFR does not model (overflow policy, NaN in place of
// infinity, the layout without negative zero).
//
// Covered: every minifloat preset with subnormals and M >= 1 (e4m3, e5m2, e3m2,
// e2m3, e2m1, fp16, bf16, fp32, e4m3-single-nan, e5m2-single-nan); 30 seeded
// random signed parameterisations (E 2..8, M 1..10, bias = default +-3,
// subnormals on, all four special layouts); 10 more with subnormals off, where
// MPFR's own model (no mpfr_subnormalize: nothing between 0 and 2^emin) is the
// reference without any extra post-step. Five rounding modes (stochastic
// rounding has no MPFR counterpart); Overflow::saturate and Overflow::special.
// Not covered here, and why:
//   - M = 0 formats (skipped): MPFR rounds 1-bit ties away from zero (both
//     neighbours have an odd significand; the IEEE 754-2008 errata rule), while
//     the library's nearest-even sends them to the even exponent field, so MPFR
//     has no counterpart for that mode; and the model below assumes M >= 1
//     (top-nan's largest value, the ieee layout's NaN codes).
//   - unsigned formats: the library's handling of negative input (everything
//     below zero clamps to 0, NaN under down+special) is a policy, not a
//     rounding MPFR could confirm.
//   - infinite and NaN inputs: exact cases, checked by the unit tests.
#include <doctest/doctest.h>
#include <mpfr.h>

#include <algorithm>
#include <bit>
#include <cfenv>
#include <cfloat>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <limits>
#include <random>
#include <stdexcept>
#include <string>
#include <vector>

#include "lobit/format/minifloat.hpp"
#include "lobit/format/spec.hpp"
#include "test_util.hpp"

namespace {

// The four IEEE rounding directions and the <cfenv> modes the hardware rounds with.
const struct {
  lobit::Rounding r;
  int fe;
} hardware_modes[] = {{lobit::Rounding::nearest_even, FE_TONEAREST},
                      {lobit::Rounding::toward_zero, FE_TOWARDZERO},
                      {lobit::Rounding::up, FE_UPWARD},
                      {lobit::Rounding::down, FE_DOWNWARD}};

using lobit::Code;
using lobit::Minifloat;
using lobit::MinifloatParams;
using lobit::Overflow;
using lobit::Rounding;
using lobit::SpecialValues;
using lobit::test::same_value;

constexpr Rounding mpfr_roundings[] = {Rounding::nearest_even, Rounding::nearest_away, Rounding::toward_zero,
                                       Rounding::up, Rounding::down};
constexpr Overflow overflow_policies[] = {Overflow::saturate, Overflow::special};
constexpr int inputs_per_mode = 100000;
constexpr std::uint64_t seed = 0x5eed'1ab1'7f10a7ull;

std::string hex(double x) {
  char buf[64];
  std::snprintf(buf, sizeof buf, "%a", x);
  return buf;
}

// The format as minifloat.hpp defines it, derived here from the parameters alone
// (not from the library's code), plus its MPFR exponent range.
struct FormatModel {
  MinifloatParams p;
  int top_field = 0;    // largest exponent field that holds finite values
  int emin = 0;         // IEEE-style exponent of the smallest normal: 1 - bias
  int quantum_min = 0;  // exponent of the smallest positive value: emin - M (subnormals off: emin)
  int emax = 0;         // IEEE-style exponent of the top finite binade: top_field - bias
  double max_finite = 0;
  // MPFR writes x = m * 2^e with m in [1/2, 1): its exponents are one more than
  // IEEE 754's (m in [1, 2)). The smallest subnormal 2^(emin-M) is 1/2 * 2^(emin-M+1),
  // so mpfr emin = emin - M + 1; the largest binade [2^emax, 2^(emax+1)) has mpfr
  // exponent emax + 1. (Binary64 gives -1073 and 1024, the values of the MPFR
  // manual's mpfr_subnormalize example; checked below against the hardware.)
  // Without subnormals the smallest positive value is 2^emin = 1/2 * 2^(emin+1):
  // mpfr emin = emin + 1 and no mpfr_subnormalize, which is MPFR's own model (no
  // subnormals: below 2^emin the grid is {0, 2^emin}, minifloat.cpp's flush grid).
  mpfr_exp_t mpfr_emin = 0, mpfr_emax = 0;
  bool has_inf = false, has_nan = false, has_negative_zero = false;
};

FormatModel model_of(const MinifloatParams& p) {
  FormatModel m;
  m.p = p;
  const int M = p.man_bits;
  const int field_max = (1 << p.exp_bits) - 1;
  // ieee: the all-ones field is infinity and NaN (IEEE 754-2019 section 3.4);
  // top_nan: only all-ones exponent and mantissa is NaN (OCP OFP8 section 5);
  // neg_zero_nan / none: every exponent field holds numbers.
  m.top_field = p.special == SpecialValues::ieee ? field_max - 1 : field_max;
  m.emin = 1 - p.bias;
  m.quantum_min = p.subnormals ? m.emin - M : m.emin;
  m.emax = m.top_field - p.bias;
  const double top_significand = p.special == SpecialValues::top_nan ? std::ldexp(1.0, M + 1) - 2  // 1.11..10
                                                                      : std::ldexp(1.0, M + 1) - 1;  // 1.11..11
  m.max_finite = std::ldexp(top_significand, m.emax - M);
  m.mpfr_emin = m.quantum_min + 1;
  m.mpfr_emax = m.emax + 1;
  m.has_inf = p.special == SpecialValues::ieee;
  m.has_nan = p.special != SpecialValues::none;
  m.has_negative_zero = p.special != SpecialValues::neg_zero_nan;
  return m;
}

mpfr_rnd_t mpfr_mode(Rounding r) {
  switch (r) {
    case Rounding::toward_zero: return MPFR_RNDZ;
    case Rounding::up: return MPFR_RNDU;
    case Rounding::down: return MPFR_RNDD;
    default: return MPFR_RNDN;
  }
}

// Sets the MPFR exponent range for the scope and restores the previous one.
class ExponentRange {
 public:
  ExponentRange(mpfr_exp_t lo, mpfr_exp_t hi) : lo_(mpfr_get_emin()), hi_(mpfr_get_emax()) {
    if (mpfr_set_emin(lo) != 0 || mpfr_set_emax(hi) != 0)
      throw std::runtime_error("MPFR rejects the exponent range " + std::to_string(lo) + ".." + std::to_string(hi));
  }
  ~ExponentRange() {
    mpfr_set_emin(lo_);
    mpfr_set_emax(hi_);
  }
  ExponentRange(const ExponentRange&) = delete;
  ExponentRange& operator=(const ExponentRange&) = delete;

 private:
  mpfr_exp_t lo_, hi_;
};

class Mpfr {
 public:
  explicit Mpfr(mpfr_prec_t prec) { mpfr_init2(v_, prec); }
  ~Mpfr() { mpfr_clear(v_); }
  Mpfr(const Mpfr&) = delete;
  Mpfr& operator=(const Mpfr&) = delete;
  mpfr_ptr get() { return v_; }

 private:
  mpfr_t v_;
};

// x rounded to the format's grid by MPFR, before any post-step: a finite value
// of at most M+1 significant bits, or MPFR's infinity on overflow. Must run
// inside the model's ExponentRange.
double mpfr_round_to_grid(const FormatModel& m, double x, Rounding r, mpfr_ptr v) {
  const int M = m.p.man_bits;
  if (r != Rounding::nearest_away) {
    // reference: GNU MPFR 4.2 (mpfr_subnormalize emulates IEEE 754 subnormals;
    // the MPFR manual's section on mpfr_subnormalize gives exactly this sequence:
    // set the exponent range, compute once at the target precision, then
    // mpfr_subnormalize with the ternary value, which also settles double
    // rounding). mpfr_set_d already returns a value inside the current exponent
    // range (overflow to infinity or the largest value, underflow per the
    // rounding mode), so mpfr_check_range has nothing left to do here.
    mpfr_set_prec(v, M + 1);
    const mpfr_rnd_t rnd = mpfr_mode(r);
    const int t = mpfr_set_d(v, x, rnd);
    if (m.p.subnormals) mpfr_subnormalize(v, t, rnd);
    return mpfr_get_d(v, MPFR_RNDN);  // exact: at most 24 bits, inside binary64
  }
  // reference: GNU MPFR 4.2 mpfr_round_nearest_away (IEEE 754-2019 section 4.3.1
  // roundTiesToAway). The macro rounds once, to nearest with ties away, to the
  // precision of its target. It cannot be followed by mpfr_subnormalize: a tie
  // on the subnormal grid is exact at M+1 bits, so the ternary value is 0 and
  // mpfr_subnormalize then rounds the tie by its own rnd argument (MPFR_RNDNA
  // is not accepted there; with MPFR_RNDN the tie goes to even: tried on E4M3,
  // 1.125 * 2^-7 became 2^-7 instead of 1.25 * 2^-7). So the subnormal range is
  // handled exactly here instead: the target precision is set to the number of
  // bits the format holds in x's binade (M+1 in the normal range, fewer below
  // it), so there is a single rounding, to the right grid. Below the smallest
  // subnormal the grid is {0, 2^quantum_min} and ties-away sends exactly half of
  // it up, which is an exact comparison of binary64 values.
  const double ax = std::fabs(x);
  int e;  // x = f * 2^e, f in [1/2, 1): the MPFR exponent of x
  std::frexp(ax, &e);
  // Without subnormals every binade from 2^emin up holds M+1 bits and below it
  // there are none.
  const long bits = m.p.subnormals ? std::min<long>(M + 1, long{e} - long{m.mpfr_emin} + 1)
                                   : (e > m.emin ? M + 1 : 0);
  if (bits < 1) {
    const double smallest = std::ldexp(1.0, m.quantum_min);
    return std::copysign(ax >= smallest / 2 ? smallest : 0.0, x);
  }
  mpfr_set_prec(v, bits);
  mpfr_round_nearest_away(mpfr_set_d, v, x);
  return mpfr_get_d(v, MPFR_RNDN);
}

// The documented post-step from MPFR's rounded value to the format's result.
//  (a) A value MPFR rounded above the largest finite magnitude is an overflow
//      (this includes MPFR's infinity and, for the top-nan layout, the value the
//      NaN pattern would have). Where the rounding heads away from zero (the
//      nearest modes, up for positive, down for negative) IEEE 754-2019 section
//      7.4 gives infinity: +-inf in the ieee layout, NaN in a format with NaN
//      but no infinity, +-max in a format with neither, under Overflow::special
//      (element_format.hpp); +-max under Overflow::saturate. The other directed
//      cases give +-max (IEEE 754-2019 section 7.4, roundTowardZero and the
//      directed modes towards the range).
//  (b) The negzero-nan layout has no -0: a negative value that rounds to zero
//      gives +0 (minifloat.hpp: its code is the single NaN).
double apply_post_step(const FormatModel& m, double x, double rounded, Rounding r, Overflow o) {
  const bool neg = std::signbit(x);
  if (std::fabs(rounded) > m.max_finite) {
    const bool beyond = (r == Rounding::nearest_even || r == Rounding::nearest_away) ||
                        (r == Rounding::up && !neg) || (r == Rounding::down && neg);
    if (beyond && o == Overflow::special) {
      if (m.has_inf) return neg ? -INFINITY : INFINITY;
      if (m.has_nan) return std::numeric_limits<double>::quiet_NaN();
    }
    return neg ? -m.max_finite : m.max_finite;
  }
  if (rounded == 0 && !m.has_negative_zero) return 0.0;
  return rounded;
}

double reference_value(const FormatModel& m, double x, Rounding r, Overflow o, mpfr_ptr v) {
  return apply_post_step(m, x, mpfr_round_to_grid(m, x, r, v), r, o);
}

// An exactly representable value of the model, from its fields (for inputs).
struct GridPoint {
  double value;
  double spacing;  // distance to the next value up in its binade
};
GridPoint random_grid_point(const FormatModel& m, std::mt19937_64& rng) {
  const int M = m.p.man_bits;
  // Every exponent field up to all ones: for ieee that field gives values from
  // 2^(emax+1) up, for top-nan it includes the NaN pattern's would-be value;
  // both are inputs that overflow.
  const int field = std::uniform_int_distribution<int>(0, (1 << m.p.exp_bits) - 1)(rng);
  const auto mant = std::uniform_int_distribution<std::uint64_t>(0, (std::uint64_t{1} << M) - 1)(rng);
  if (field == 0) {
    if (!m.p.subnormals) return {0.0, std::ldexp(1.0, m.emin)};  // grid {0, 2^emin}
    return {std::ldexp(static_cast<double>(mant), m.quantum_min), std::ldexp(1.0, m.quantum_min)};
  }
  const int q = field - m.p.bias - M;
  return {std::ldexp(static_cast<double>((std::uint64_t{1} << M) | mant), q), std::ldexp(1.0, q)};
}

// Inputs: 40% log-uniform over the format's binades and 4 beyond each end,
// 20% exact grid values, 20% exact midpoints, 20% the binary64 neighbours of
// midpoints; random sign.
std::vector<double> make_inputs(const FormatModel& m, std::mt19937_64& rng, int n) {
  std::vector<double> xs;
  xs.reserve(n);
  std::uniform_real_distribution<double> log2_mag(m.quantum_min - 4.0, m.emax + 5.0);
  std::uniform_int_distribution<int> kind(0, 9);
  std::bernoulli_distribution negative(0.5);
  for (int i = 0; i < n; ++i) {
    double x;
    const int k = kind(rng);
    if (k < 4) {
      x = std::exp2(log2_mag(rng));
    } else {
      const GridPoint g = random_grid_point(m, rng);
      if (k < 6) x = g.value;
      else if (k < 8) x = g.value + g.spacing / 2;  // exact: M+2 bits
      else x = std::nextafter(g.value + g.spacing / 2, negative(rng) ? 0.0 : INFINITY);
    }
    xs.push_back(negative(rng) ? -x : x);
  }
  return xs;
}

struct Named {
  std::string name;
  MinifloatParams params;
};

// Runs every rounding mode and overflow policy on one format; one CHECK each.
void check_against_mpfr(const Named& f, std::mt19937_64& rng) {
  const FormatModel m = model_of(f.params);
  const Minifloat lib(f.params);
  Mpfr v(64);
  for (const Rounding r : mpfr_roundings) {
    const std::vector<double> xs = make_inputs(m, rng, inputs_per_mode);
    std::vector<double> rounded(xs.size());
    {
      const ExponentRange range(m.mpfr_emin, m.mpfr_emax);
      for (std::size_t i = 0; i < xs.size(); ++i) rounded[i] = mpfr_round_to_grid(m, xs[i], r, v.get());
    }
    for (const Overflow o : overflow_policies) {
      long mismatches = 0;
      std::string first;
      for (std::size_t i = 0; i < xs.size(); ++i) {
        // reference: GNU MPFR 4.2 (mpfr_subnormalize emulates IEEE 754 subnormals;
        // mpfr_round_nearest_away for ties-away), plus the post-step above.
        const double want = apply_post_step(m, xs[i], rounded[i], r, o);
        const Code c = lib.encode(xs[i], r, o);
        const double got = lib.decode(c);
        if (!same_value(got, want)) {
          if (++mismatches <= 5)
            first += "\n  x=" + hex(xs[i]) + " want " + hex(want) + " got " + hex(got) + " (code " +
                     std::to_string(c) + ")";
        }
      }
      INFO(f.name, " = ", lib.spec(), ", rounding ", lobit::to_string(r), ", overflow ", lobit::to_string(o));
      CHECK_MESSAGE(mismatches == 0, mismatches, " of ", xs.size(), " inputs differ from MPFR; first:", first);
    }
  }
}

MinifloatParams params_of_preset(const char* name) {
  const auto f = lobit::parse_element(name);
  const auto* mf = dynamic_cast<const Minifloat*>(f.get());
  REQUIRE_MESSAGE(mf != nullptr, name, " is not a minifloat");
  return mf->params();
}

}  // namespace

TEST_CASE("the MPFR reference reproduces the hardware's binary32 conversion in the four IEEE rounding directions") {
  // reference: the x86-64 SSE conversion binary64 -> binary32 (cvtsd2ss), IEEE
  // 754-2019 section 5.4.2 convertFormat, under the rounding direction set by
  // fesetround (C11 7.6.3). This validates the MPFR exponent-range convention
  // and the subnormalisation, independently of lobit.
  const FormatModel fp32 = model_of({.exp_bits = 8, .man_bits = 23, .bias = 127});
  CHECK(fp32.max_finite == double{FLT_MAX});                      // C <float.h>
  CHECK(std::ldexp(1.0, fp32.quantum_min) == double{FLT_TRUE_MIN});
  CHECK(fp32.mpfr_emin == -148);  // MPFR's binary32 emulation range, with emax 128
  CHECK(fp32.mpfr_emax == 128);

  std::mt19937_64 rng(seed);
  std::vector<double> xs = make_inputs(fp32, rng, 200000);
  // Midpoints between neighbouring binary32 values of random bit patterns, and
  // their binary64 neighbours: the hardest cases of double rounding.
  std::uniform_int_distribution<std::uint32_t> bits(0, 0x7f7fffff);
  for (int i = 0; i < 50000; ++i) {
    const float a = std::bit_cast<float>(bits(rng));
    const double mid = (double{a} + double{std::nextafter(a, INFINITY)}) / 2;
    xs.push_back(mid);
    xs.push_back(-std::nextafter(mid, 0.0));
    xs.push_back(std::nextafter(mid, INFINITY));
  }
  Mpfr v(64);
  for (const auto& mode : hardware_modes) {
    std::vector<double> hw(xs.size());
    REQUIRE(std::fesetround(mode.fe) == 0);
    for (std::size_t i = 0; i < xs.size(); ++i) {
      volatile double in = xs[i];
      volatile float out = static_cast<float>(in);
      hw[i] = out;
    }
    std::fesetround(FE_TONEAREST);
    long mismatches = 0;
    std::string first;
    {
      const ExponentRange range(fp32.mpfr_emin, fp32.mpfr_emax);
      for (std::size_t i = 0; i < xs.size(); ++i) {
        const double want = hw[i];
        const double got = reference_value(fp32, xs[i], mode.r, Overflow::special, v.get());
        if (!same_value(got, want) && ++mismatches <= 5)
          first += "\n  x=" + hex(xs[i]) + " hardware " + hex(want) + " reference " + hex(got);
      }
    }
    INFO("rounding ", lobit::to_string(mode.r));
    CHECK_MESSAGE(mismatches == 0, mismatches, " differ; first:", first);
  }
}

TEST_CASE("the MPFR exponent convention reproduces binary64 subnormal and overflowing products") {
  // reference: the hardware's binary64 multiplication (IEEE 754-2019 section 5.4.1,
  // subnormal results per section 7.5, overflow per 7.4) against MPFR at 53 bits in
  // the range model_of gives binary64 (the MPFR manual's mpfr_subnormalize example
  // uses the same -1073 / 1024).
  const FormatModel fp64 = model_of({.exp_bits = 11, .man_bits = 52, .bias = 1023});
  CHECK(fp64.mpfr_emin == -1073);
  CHECK(fp64.mpfr_emax == 1024);
  std::mt19937_64 rng(seed + 1);
  std::uniform_real_distribution<double> half_log(-540.0, -505.0), top_log(506.0, 513.0);
  std::bernoulli_distribution coin(0.5);
  Mpfr a(53), b(53), p(53);
  for (const auto& mode : hardware_modes) {
    long mismatches = 0;
    std::string first;
    for (int i = 0; i < 100000; ++i) {
      const bool low = coin(rng);
      const double x = std::exp2(low ? half_log(rng) : top_log(rng)) * (coin(rng) ? -1 : 1);
      const double y = std::exp2(low ? half_log(rng) : top_log(rng));
      std::fesetround(mode.fe);
      volatile double vx = x, vy = y;
      volatile double hw = vx * vy;
      std::fesetround(FE_TONEAREST);
      double ref;
      {
        const ExponentRange range(fp64.mpfr_emin, fp64.mpfr_emax);
        mpfr_set_d(a.get(), x, MPFR_RNDN);  // exact
        mpfr_set_d(b.get(), y, MPFR_RNDN);
        const mpfr_rnd_t rnd = mpfr_mode(mode.r);
        const int t = mpfr_mul(p.get(), a.get(), b.get(), rnd);
        mpfr_subnormalize(p.get(), t, rnd);
        ref = mpfr_get_d(p.get(), MPFR_RNDN);
      }
      if (!same_value(ref, hw) && ++mismatches <= 5)
        first += "\n  " + hex(x) + " * " + hex(y) + ": hardware " + hex(hw) + " MPFR " + hex(ref);
    }
    INFO("rounding ", lobit::to_string(mode.r));
    CHECK_MESSAGE(mismatches == 0, mismatches, " differ; first:", first);
  }
}

TEST_CASE("the ties-away reference rounds ties away from zero and agrees with nearest-even elsewhere") {
  // reference: IEEE 754-2019 section 4.3.1 roundTiesToAway, applied by hand to
  // the E2M1 value set {0, 0.5, 1, 1.5, 2, 3, 4, 6} (OCP MX v1.0, FP4 E2M1), whose
  // next binade would continue with 8.
  const FormatModel e2m1 = model_of({.exp_bits = 2, .man_bits = 1, .bias = 1, .special = SpecialValues::none});
  REQUIRE(e2m1.max_finite == 6.0);
  Mpfr v(64);
  {
    const ExponentRange range(e2m1.mpfr_emin, e2m1.mpfr_emax);
    const struct {
      double x, away, even;
    } ties[] = {{0.25, 0.5, 0.0}, {0.75, 1.0, 1.0}, {1.25, 1.5, 1.0}, {1.75, 2.0, 2.0},
                {2.5, 3.0, 2.0},  {3.5, 4.0, 4.0},  {5.0, 6.0, 4.0},
                // 8 = 1/2 * 2^4 lies above MPFR's emax (3): overflow, MPFR's infinity
                {7.0, INFINITY, INFINITY}};
    for (const auto& t : ties) {
      CAPTURE(t.x);
      CHECK(mpfr_round_to_grid(e2m1, t.x, Rounding::nearest_away, v.get()) == t.away);
      CHECK(mpfr_round_to_grid(e2m1, -t.x, Rounding::nearest_away, v.get()) == -t.away);
      CHECK(mpfr_round_to_grid(e2m1, t.x, Rounding::nearest_even, v.get()) == t.even);
    }
    CHECK(mpfr_round_to_grid(e2m1, std::nextafter(0.25, 0.0), Rounding::nearest_away, v.get()) == 0.0);
    CHECK(mpfr_round_to_grid(e2m1, std::nextafter(0.25, 1.0), Rounding::nearest_even, v.get()) == 0.5);
  }

  // Away from ties the two nearest modes agree; where they differ, x is exactly
  // halfway and the ties-away result is the larger magnitude (checked in exact
  // MPFR arithmetic at 2200 bits, enough for any difference of binary64 values).
  for (const char* name : {"e2m1", "e3m2", "e4m3", "fp16", "bf16"}) {
    const FormatModel m = model_of(params_of_preset(name));
    std::mt19937_64 rng(seed + 2);
    const std::vector<double> xs = make_inputs(m, rng, 50000);
    long bad = 0, differing = 0;
    Mpfr d1(2200), d2(2200), wide(64);
    for (const double x : xs) {
      double away, even;
      {
        const ExponentRange fr(m.mpfr_emin, m.mpfr_emax);
        away = mpfr_round_to_grid(m, x, Rounding::nearest_away, wide.get());
        even = mpfr_round_to_grid(m, x, Rounding::nearest_even, wide.get());
      }
      if (away == even) continue;
      ++differing;
      if (std::isinf(even)) even = std::copysign(std::ldexp(1.0, m.emax + 1), x);  // MPFR overflowed the tie
      if (std::isinf(away)) away = std::copysign(std::ldexp(1.0, m.emax + 1), x);
      mpfr_set_d(d1.get(), std::fabs(x), MPFR_RNDN);
      mpfr_sub_d(d1.get(), d1.get(), std::fabs(even), MPFR_RNDN);  // exact at 2200 bits
      mpfr_set_d(d2.get(), std::fabs(away), MPFR_RNDN);
      mpfr_sub_d(d2.get(), d2.get(), std::fabs(x), MPFR_RNDN);
      const bool tie = mpfr_cmpabs(d1.get(), d2.get()) == 0;
      if (!tie || !(std::fabs(away) > std::fabs(even))) ++bad;
    }
    INFO(std::string(name));
    CHECK(differing > 1000);  // the inputs hold many exact midpoints
    CHECK(bad == 0);
  }
}

TEST_CASE("every minifloat preset with subnormals encodes as GNU MPFR rounds, in five modes and both overflow policies") {
  std::mt19937_64 rng(seed + 3);
  for (const char* name : {"e4m3", "e5m2", "e3m2", "e2m3", "e2m1", "fp16", "bf16", "fp32", "e4m3-single-nan",
                           "e5m2-single-nan"}) {
    const MinifloatParams p = params_of_preset(name);
    REQUIRE(p.subnormals);
    REQUIRE(p.man_bits >= 1);
    check_against_mpfr({name, p}, rng);
  }
}

// Seeded random signed ExMy: E 2..8, M 1..10, the default bias (minifloat.hpp:
// 2^(E-1)-1, one more for negzero-nan) +-3, any special layout.
static void check_random_formats(int count, bool subnormals, std::uint64_t stream) {
  std::mt19937_64 rng(seed + stream);
  std::uniform_int_distribution<int> exp_bits(2, 8), man_bits(1, 10), bias_offset(-3, 3), layout(0, 3);
  constexpr SpecialValues layouts[] = {SpecialValues::ieee, SpecialValues::top_nan, SpecialValues::neg_zero_nan,
                                       SpecialValues::none};
  for (int i = 0; i < count; ++i) {
    MinifloatParams p;
    p.exp_bits = exp_bits(rng);
    p.man_bits = man_bits(rng);
    p.special = layouts[layout(rng)];
    const int default_bias = (1 << (p.exp_bits - 1)) - 1 + (p.special == SpecialValues::neg_zero_nan ? 1 : 0);
    p.bias = default_bias + bias_offset(rng);
    p.sign = true;
    p.subnormals = subnormals;
    check_against_mpfr({"random #" + std::to_string(i), p}, rng);
  }
}

TEST_CASE("30 random ExMy parameterisations encode as GNU MPFR rounds, in five modes and both overflow policies") {
  check_random_formats(30, true, 4);
}

TEST_CASE("10 random ExMy parameterisations without subnormals round as MPFR does without mpfr_subnormalize") {
  // reference: GNU MPFR 4.2 with no subnormal emulation: below its smallest
  // positive value 2^emin the only neighbours are 0 and 2^emin (MPFR manual,
  // exceptions: underflow rounds to 0 or the smallest positive number per the
  // rounding mode, the halfway case under MPFR_RNDN going to 0).
  check_random_formats(10, false, 5);
}
