// Exact MSE of scalar formats at a fixed scale, and the optimal scale: closed
// forms, the common-practice rules for uniform quantizers, and seeded Monte
// Carlo estimates through the library's own encoders.
#include <doctest/doctest.h>

#include <cmath>
#include <random>
#include <vector>

#include "lobit/error.hpp"
#include "lobit/format/codebook.hpp"
#include "lobit/measure/exact_error.hpp"
#include "test_util.hpp"

using namespace lobit;
using lobit::test::fmt;

namespace {

constexpr double pi = 3.141592653589793;
constexpr double sqrt3 = 1.7320508075688772;
constexpr Density all_densities[] = {Density::gauss, Density::laplace, Density::uniform};

// P(X > x) for the three unit-variance densities (std::erfc / std::exp).
double upper_tail(Density d, double x) {
  switch (d) {
    case Density::gauss: return 0.5 * std::erfc(x / std::sqrt(2.0));
    case Density::laplace: return x >= 0 ? 0.5 * std::exp(-std::sqrt(2.0) * x) : 1 - 0.5 * std::exp(std::sqrt(2.0) * x);
    case Density::uniform: return x >= sqrt3 ? 0 : (x <= -sqrt3 ? 1 : (sqrt3 - x) / (2 * sqrt3));
  }
  return 0;
}

// E|X|: sqrt(2/pi), b = 1/sqrt2, sqrt3/2.
double mean_abs(Density d) {
  switch (d) {
    case Density::gauss: return std::sqrt(2 / pi);
    case Density::laplace: return 1 / std::sqrt(2.0);
    case Density::uniform: return sqrt3 / 2;
  }
  return 0;
}

std::vector<double> mid_rise(int levels) {
  std::vector<double> v;
  for (int i = 0; i < levels; ++i) v.push_back(i - (levels - 1) / 2.0);
  return v;
}

double relative(double a, double b) { return std::fabs(a - b) / std::fabs(b); }

}  // namespace

TEST_CASE("density names read back") {
  for (Density d : all_densities) CHECK(parse_density(to_string(d)) == d);
  CHECK(to_string(Density::gauss) == "gauss");
  CHECK(to_string(Density::laplace) == "laplace");
  CHECK(to_string(Density::uniform) == "uniform");
  CHECK_FALSE(parse_density("normal").has_value());
  CHECK_FALSE(parse_density("").has_value());
}

TEST_CASE("a two-level quantizer has the textbook closed form") {
  // q(x) = s sign(x): MSE = E[(|x| - s)^2] = 1 - 2 s E|x| + s^2 (closed form).
  const Codebook two({-1.0, 1.0});
  for (Density d : all_densities)
    for (double s : {0.3, 0.7978845608028654, 1.7}) {
      INFO(to_string(d), " scale ", s);
      const ExactError e = exact_mse(two, d, s);
      const double expect = 1 - 2 * s * mean_abs(d) + s * s;
      CHECK(relative(e.mse, expect) < 1e-15);
      CHECK(e.signal_power == 1);
      CHECK(relative(e.sqnr_db, -10 * std::log10(expect)) < 1e-14);
      CHECK(e.zero_probability == 0);
      CHECK(relative(e.clip_probability, 2 * upper_tail(d, s)) < 1e-14);
    }
}

TEST_CASE("clip and zero probabilities of an integer grid") {
  // int4: values -8..7; at scale s the zero cell is |x| < s/2, and inputs
  // beyond 7s or below -8s are clipped.
  auto f = fmt("int4");
  for (Density d : all_densities)
    for (double s : {0.05, 0.3, 0.9}) {
      INFO(to_string(d), " scale ", s);
      const ExactError e = exact_mse(*f, d, s);
      const double clip = upper_tail(d, 7 * s) + upper_tail(d, 8 * s);
      if (clip > 0) CHECK(relative(e.clip_probability, clip) < 1e-13);
      else CHECK(e.clip_probability == 0);
      CHECK(relative(e.zero_probability, 1 - 2 * upper_tail(d, s / 2)) < 1e-13);
    }
}

TEST_CASE("uniform input: noise is step^2/12 and SQNR rises 6.02 dB per bit (common practice)") {
  // k levels tiling [-sqrt3, sqrt3] exactly: step 2 sqrt3 / k, every cell a
  // full uniform cell, MSE = step^2 / 12 = 1 / k^2 (common practice).
  double previous_sqnr = 0;
  for (int b = 1; b <= 16; ++b) {
    INFO("mid-rise, bits ", b);
    const int k = 1 << b;
    const Codebook grid(mid_rise(k));
    const double step = 2 * sqrt3 / k;
    const ExactError e = exact_mse(grid, Density::uniform, step);
    CHECK(relative(e.mse, step * step / 12) < 1e-12);
    CHECK(e.clip_probability == doctest::Approx(1.0 / k).epsilon(1e-12));  // the two outer half cells
    // 20 log10 2 = 6.0206 dB per bit, here exactly.
    if (b > 1) CHECK(e.sqnr_db - previous_sqnr == doctest::Approx(20 * std::log10(2.0)).epsilon(1e-10));
    previous_sqnr = e.sqnr_db;
  }
  // Symmetric integers (2^b - 1 levels, mid-tread): the same rule.
  for (int b = 2; b <= 8; ++b) {
    INFO("int+range=symmetric, bits ", b);
    const std::string spec = "int+bits=" + std::to_string(b) + "+range=symmetric";
    auto f = fmt(spec.c_str());
    const int k = (1 << b) - 1;
    const double step = 2 * sqrt3 / k;
    const ExactError e = exact_mse(*f, Density::uniform, step);
    CHECK(relative(e.mse, 1.0 / (static_cast<double>(k) * k)) < 1e-12);
    CHECK(relative(e.zero_probability, 1.0 / k) < 1e-12);
  }
}

TEST_CASE("tiny cells lose nothing: a fine integer grid on the Gaussian gives step^2/12 to 1e-13") {
  // For a grid finer than the density (step 2^-7, range +-16 sigma) the
  // granular MSE is step^2/12 up to terms that are exponentially small for the
  // Gaussian (Euler-Maclaurin: every correction is a sum of derivatives of
  // the density over the grid, which vanishes to all orders), and overload
  // beyond 16 sigma is below 1e-50. In binary64, E = M2 - 2 c M1 + c^2 M0
  // would lose ~6 digits here, and CDF differences more.
  auto f = fmt("int+bits=12");
  const double s = std::ldexp(1.0, -7);
  const ExactError g = exact_mse(*f, Density::gauss, s);
  CHECK(relative(g.mse, s * s / 12) < 1e-13);
  // The Laplacian's kink at 0 and its overload beyond 16 sigma leave a
  // visible O(1e-5) deviation: only the order is checked.
  const ExactError l = exact_mse(*f, Density::laplace, s);
  CHECK(relative(l.mse, s * s / 12) < 1e-4);
  CHECK(relative(l.mse, s * s / 12) > 1e-7);
}

TEST_CASE("the zero cell of a float is its subnormal half-step") {
  // e5m2: smallest subnormal 2^-16, so x quantizes to 0 for |x| < 2^-17:
  // P = erf(2^-17 / sqrt2) = 2 h phi(0) (1 - h^2/6 + ...), h = 2^-17.
  auto f = fmt("e5m2");
  const ExactError e = exact_mse(*f, Density::gauss, 1.0);
  const long double h = std::ldexp(1.0L, -17);
  const long double expect = 2 * h * 0.398942280401432677939946L * (1 - h * h / 6);
  CHECK(std::fabs(static_cast<long double>(e.zero_probability) / expect - 1) < 1e-15L);
  // Neighbours 2^-60 apart around zero: the cell integrals cancel in every
  // closed form; the result must still be the exact probability.
  const double t = std::ldexp(1.0, -60);
  const std::vector<double> close{-1.0, -t, 0.0, t, 1.0};
  const ExactError c = exact_mse_levels(close, Density::gauss, 1.0);
  CHECK(relative(c.zero_probability, t * 0.3989422804014327) < 1e-15);
  const std::vector<double> three{-1.0, 0.0, 1.0};
  CHECK(relative(c.mse, exact_mse_levels(three, Density::gauss, 1.0).mse) < 1e-15);
}

TEST_CASE("exact MSE agrees with seeded Monte Carlo through the library's encoders") {
  // 2e6 standard normal samples (std::mt19937_64, seed 20240611); the MC
  // quantizer is scale * decode(encode(x / scale, nearest_even, saturate)).
  // Agreement within 4.5 standard errors of the MC mean (from the sample
  // variance of the squared errors); probabilities within 4.5 binomial SEs.
  constexpr int n = 2'000'000;
  std::mt19937_64 rng(20240611);
  std::normal_distribution<double> normal;
  std::vector<double> xs(n);
  for (double& x : xs) x = normal(rng);
  for (const char* name : {"e2m1", "e3m2", "e2m3", "e4m3", "int4", "int8", "nf4"}) {
    auto f = fmt(name);
    const double opt = optimal_scale(*f, Density::gauss).scale;
    for (double s : {opt, 1.7 * opt}) {
      INFO(std::string(name), " scale ", s);
      const ExactError e = exact_mse(*f, Density::gauss, s);
      double sum = 0, sum2 = 0;
      long zeros = 0, clips = 0;
      const double top = s * f->decode(f->encode(1e300, Rounding::nearest_even, Overflow::saturate));
      const double bottom = s * f->decode(f->encode(-1e300, Rounding::nearest_even, Overflow::saturate));
      for (double x : xs) {
        const double q = s * f->decode(f->encode(x / s, Rounding::nearest_even, Overflow::saturate));
        const double err = (x - q) * (x - q);
        sum += err;
        sum2 += err * err;
        zeros += q == 0;
        clips += x > top || x < bottom;
      }
      const double mean = sum / n, var = (sum2 / n - mean * mean) * n / (n - 1);
      const double se = std::sqrt(var / n);
      CHECK(std::fabs(e.mse - mean) <= 4.5 * se);
      const double pz = static_cast<double>(zeros) / n, pc = static_cast<double>(clips) / n;
      CHECK(std::fabs(e.zero_probability - pz) <= 4.5 * std::sqrt(e.zero_probability * (1 - e.zero_probability) / n) + 1e-12);
      CHECK(std::fabs(e.clip_probability - pc) <= 4.5 * std::sqrt(e.clip_probability * (1 - e.clip_probability) / n) + 1e-12);
      // The check can fail: where the estimate is tight (no rare large
      // clipping errors), a 1% error in the exact value is far outside it.
      if (se < 1e-3 * e.mse) CHECK(std::fabs(1.01 * e.mse - mean) > 4.5 * se);
    }
  }
}

TEST_CASE("exact MSE agrees with Monte Carlo for the Laplace and uniform densities") {
  // 1e6 samples each: Laplace as sign * Exp(sqrt2), uniform on [-sqrt3, sqrt3].
  constexpr int n = 1'000'000;
  std::mt19937_64 rng(7);
  std::exponential_distribution<double> expo(std::sqrt(2.0));
  std::uniform_real_distribution<double> uni(-sqrt3, sqrt3);
  std::bernoulli_distribution coin;
  for (Density d : {Density::laplace, Density::uniform}) {
    std::vector<double> xs(n);
    for (double& x : xs) x = d == Density::laplace ? (coin(rng) ? 1 : -1) * expo(rng) : uni(rng);
    for (const char* name : {"e2m1", "int4", "nf4"}) {
      auto f = fmt(name);
      const double s = optimal_scale(*f, d).scale;
      INFO(to_string(d), " ", std::string(name), " scale ", s);
      const ExactError e = exact_mse(*f, d, s);
      double sum = 0, sum2 = 0;
      for (double x : xs) {
        const double q = s * f->decode(f->encode(x / s, Rounding::nearest_even, Overflow::saturate));
        const double err = (x - q) * (x - q);
        sum += err;
        sum2 += err * err;
      }
      const double mean = sum / n, se = std::sqrt((sum2 / n - mean * mean) / (n - 1));
      CHECK(std::fabs(e.mse - mean) <= 4.5 * se);
    }
  }
}

TEST_CASE("the optimal scale of a two-level quantizer is the conditional mean") {
  // Levels +-s: dMSE/ds = 0 at s = E|x|, MSE = 1 - (E|x|)^2 (closed form;
  // for the Gaussian, Max 1960: level 0.7979, MSE 0.3634).
  const Codebook two({-1.0, 1.0});
  for (Density d : all_densities) {
    INFO(to_string(d));
    const OptimalScale o = optimal_scale(two, d);
    CHECK(relative(o.scale, mean_abs(d)) < 1e-12);
    CHECK(relative(o.error.mse, 1 - mean_abs(d) * mean_abs(d)) < 1e-15);
  }
}

TEST_CASE("on the uniform density a symmetric integer grid is best when it tiles the support") {
  // 15 levels: step 2 sqrt3 / 15, MSE 1/225 (common practice: the uniform
  // quantizer is optimal for the uniform density).
  auto f = fmt("int+bits=4+range=symmetric");
  const OptimalScale o = optimal_scale(*f, Density::uniform);
  CHECK(relative(o.scale, 2 * sqrt3 / 15) < 1e-10);
  CHECK(relative(o.error.mse, 1.0 / 225) < 1e-12);
}

TEST_CASE("the optimal scale is the lowest exact MSE, locally and over a wide grid") {
  for (const char* name : {"e2m1", "e3m2", "int4", "nf4", "e4m3", "uint4"}) {
    auto f = fmt(name);
    for (Density d : all_densities) {
      INFO(std::string(name), " ", to_string(d));
      const OptimalScale o = optimal_scale(*f, d);
      CHECK(o.error.mse == exact_mse(*f, d, o.scale).mse);
      // Stationary: tiny relative moves do not lower it (beyond rounding).
      for (double r : {1e-7, 1e-4, 1e-2}) {
        CHECK(exact_mse(*f, d, o.scale * (1 + r)).mse >= o.error.mse * (1 - 1e-15));
        CHECK(exact_mse(*f, d, o.scale * (1 - r)).mse >= o.error.mse * (1 - 1e-15));
      }
      // Global over [s/8, 8 s] on a log grid of 121 points.
      double lowest = INFINITY;
      for (int i = -60; i <= 60; ++i) lowest = std::min(lowest, exact_mse(*f, d, o.scale * std::exp2(i / 20.0)).mse);
      CHECK(o.error.mse <= lowest * (1 + 1e-15));
    }
  }
}

TEST_CASE("bad input is refused with a usage error") {
  auto f = fmt("int4");
  for (double s : {0.0, -1.0, std::nan(""), HUGE_VAL}) {
    INFO("scale ", s);
    CHECK_THROWS_AS(exact_mse(*f, Density::gauss, s), Error);
    try {
      exact_mse(*f, Density::gauss, s);
    } catch (const Error& e) {
      CHECK(e.kind() == Error::Kind::usage);
      CHECK_FALSE(e.hint().empty());
    }
  }
  CHECK_THROWS_AS(exact_mse(*fmt("fp32"), Density::gauss, 1.0), Error);
  CHECK_THROWS_AS(optimal_scale(*fmt("fp32"), Density::gauss), Error);
  const std::vector<double> unsorted{1.0, -1.0}, empty{}, single{1.0}, repeated{1.0, 1.0};
  CHECK_THROWS_AS(exact_mse_levels(unsorted, Density::gauss, 1.0), Error);
  CHECK_THROWS_AS(exact_mse_levels(repeated, Density::gauss, 1.0), Error);
  CHECK_THROWS_AS(exact_mse_levels(empty, Density::gauss, 1.0), Error);
  CHECK_THROWS_AS(optimal_scale_levels(single, Density::gauss), Error);
  // One level is still a quantizer: q(x) = s v, MSE 1 + (s v)^2.
  CHECK(exact_mse_levels(single, Density::laplace, 0.5).mse == doctest::Approx(1.25).epsilon(1e-15));
}
