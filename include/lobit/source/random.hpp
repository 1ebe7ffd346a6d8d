#pragma once
// Counter-based random numbers: one 64-bit word per (key, index), and
// transforms from one word to one variate.
//
// Generator. SplitMix64 (G. L. Steele Jr., D. Lea, C. H. Flood, "Fast Splittable
// Pseudorandom Number Generators", OOPSLA 2014), with the output mix that
// java.util.SplittableRandom and Vigna's splitmix64.c use (Stafford's "Mix13"
// variant of the MurmurHash3 finaliser). SplitMix64's n-th output from state s is
// mix64(s + n * gamma) with gamma = 0x9e3779b97f4a7c15: a pure function of the
// counter n, so it is a counter-based generator in the sense of Salmon, Moraes,
// Dror and Shaw, "Parallel Random Numbers: As Easy as 1, 2, 3" (SC'11). We use
// it rather than their Philox4x32-10 for cost: one word is two 64-bit multiplies
// and three xor-shifts (Philox: twenty 32x32->64 multiplies per 128 bits), and
// the loop vectorises. SplitMix64 passes TestU01 BigCrush (Steele et al. 2014).
//
//   word(key, i)      = mix64(key + (i + 1) * gamma)     (SplitMix64 output i from state key)
//   key(seed, stream) = word(mix64(seed + gamma), stream) (our derivation, not from a paper)
//
// Two streams are the same Weyl sequence at different offsets; their first L
// words overlap with probability about 2L / 2^64 for pseudo-random keys (for
// L = 2^40, once in 8 million stream pairs).
//
// Variates. Each takes one word and uses a fixed set of its bits, so element i
// of a tensor is a function of (key, i) alone: chunking and threading cannot
// change a value. Every step is an IEEE 754 basic operation (no libm calls, no
// FMA contraction under the project's -ffp-contract=off), so the values are the
// same bit for bit on every platform and for every vector width.
//   gauss      Box-Muller (Box and Muller 1958), the cosine branch only, written
//              as r * sin(pi t) with t uniform on (-1/2, 1/2): the same arcsine
//              law as cos(2 pi u), with no range reduction. 32 bits for the
//              radius (|z| <= 6.77: the cut tail has mass 2^-33, 1.2e-10) and
//              32 for the angle.
//   student_t  Bailey's polar method in its trigonometric form (R. W. Bailey,
//              "Polar generation of random variates with the t-distribution",
//              Math. Comp. 62 (1994) 779-781): T = sqrt(nu (u^(-2/nu) - 1)) *
//              sin(pi t) (u, t as for gauss). Exact for every nu > 0 with one word, no rejection;
//              it becomes Box-Muller as nu -> infinity. Same 32/32 bit split.
//              Cost: gauss plus one expm1.
//   laplace    inverse CDF: sign bit, |x| = -b ln u, u from 52 bits.
//   logistic   inverse CDF: sign bit, |x| = s ln((1 - p) / p), p in (0, 1/2) from 51 bits.
//   uniform    52 bits, symmetric about 0.
// All but student_t are scaled to unit variance.
//
// The elementary functions below (ln, sin(pi t), expm1, exp) are short Taylor
// series after an exact reduction; each is checked against the C library in
// tests/source/synthetic_test.cpp (a few ulps).
#include <bit>
#include <cmath>
#include <cstdint>

namespace lobit::rng {

inline constexpr std::uint64_t golden_gamma = 0x9e3779b97f4a7c15ull;  // 2^64 / golden ratio, odd

// SplitMix64's output function (Mix13 constants).
constexpr std::uint64_t mix64(std::uint64_t z) noexcept {
  z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ull;
  z = (z ^ (z >> 27)) * 0x94d049bb133111ebull;
  return z ^ (z >> 31);
}

// Output `index` (0-based) of SplitMix64 started from `state`.
constexpr std::uint64_t splitmix64(std::uint64_t state, std::uint64_t index) noexcept {
  return mix64(state + (index + 1) * golden_gamma);
}

// The key of stream `stream` under `seed`.
constexpr std::uint64_t stream_key(std::uint64_t seed, std::uint64_t stream) noexcept {
  return splitmix64(mix64(seed + golden_gamma), stream);
}

// 64 random bits for any index of one (seed, stream).
class CounterRng {
 public:
  constexpr CounterRng(std::uint64_t seed, std::uint64_t stream = 0) noexcept : key_(stream_key(seed, stream)) {}
  constexpr std::uint64_t operator()(std::uint64_t index) const noexcept { return splitmix64(key_, index); }
  constexpr std::uint64_t key() const noexcept { return key_; }

 private:
  std::uint64_t key_;
};

namespace detail {

inline constexpr std::uint64_t one_bits = 0x3ff0000000000000ull;  // 1.0
inline constexpr std::uint64_t mantissa_mask = (std::uint64_t{1} << 52) - 1;
inline constexpr std::uint64_t sign_bit = std::uint64_t{1} << 63;
inline constexpr double pi = 3.14159265358979323846;
inline constexpr double inv_ln2 = 1.44269504088896340736;
// ln 2 in two parts (Cody and Waite 1980): the high part has 21 trailing zero
// bits, so k * ln2_hi is exact for |k| < 2^21.
inline constexpr double ln2_hi = 0x1.62e42feep-1;
inline constexpr double ln2_lo = 0x1.a39ef35793c76p-33;

// c ? a : b, both computed. The kernels' translation unit is compiled with
// -fno-trapping-math so that GCC turns this into a vector blend rather than a
// branch (see src/source_sources.cmake).
inline double select(bool c, double a, double b) noexcept { return c ? a : b; }

constexpr double inv_factorial(int n) {
  double f = 1.0;
  for (int i = 2; i <= n; ++i) f *= i;
  return 1.0 / f;
}

// (hi + 1/2) 2^-32 for the top 32 bits of w: in (0, 1), exact (Sterbenz).
inline double open_unit_hi32(std::uint64_t w) noexcept {
  return std::bit_cast<double>(one_bits | ((w >> 32) << 20)) - (1.0 - 0x1p-33);
}
// (lo + 1/2) 2^-32 - 1/2 for the low 32 bits: in (-1/2, 1/2), exact, symmetric.
inline double centered_lo32(std::uint64_t w) noexcept {
  return std::bit_cast<double>(one_bits | ((w & 0xffffffffull) << 20)) - (1.5 - 0x1p-33);
}
// (m + 1/2) 2^-52 for m = the low `bits` (<= 52) bits of w: in (0, 2^(bits-52)), exact.
template <int bits>
inline double open_unit_low(std::uint64_t w) noexcept {
  static_assert(bits >= 1 && bits <= 52);
  const std::uint64_t m = w & ((std::uint64_t{1} << bits) - 1);
  return std::bit_cast<double>(one_bits | m) - (1.0 - 0x1p-53);
}

// ln x for positive normal x. x = m 2^k with m in [sqrt(1/2), sqrt(2)) by integer
// arithmetic on the bits (the offset trick of fdlibm/musl), then
// ln m = 2 atanh(s) with s = (m - 1) / (m + 1), |s| <= 0.1716, summed as the
// atanh Taylor series through s^21 (truncation < 1e-17 relative).
inline double log_pos(double x) noexcept {
  constexpr std::uint64_t sqrt_half_bits = std::bit_cast<std::uint64_t>(0.70710678118654752440);
  const std::uint64_t ix = std::bit_cast<std::uint64_t>(x) + (one_bits - sqrt_half_bits);
  const double m = std::bit_cast<double>((ix & mantissa_mask) + sqrt_half_bits);
  // k = (ix >> 52) - 1023 as a double, without an int64 -> double conversion.
  const double k = std::bit_cast<double>((ix >> 52) | 0x4330000000000000ull) - (0x1p52 + 1023.0);
  const double f = m - 1.0;  // exact: m in [1/2, 2]
  const double s = f / (m + 1.0);
  const double z = s * s;
  double p = 1.0 / 21;
  p = p * z + 1.0 / 19;
  p = p * z + 1.0 / 17;
  p = p * z + 1.0 / 15;
  p = p * z + 1.0 / 13;
  p = p * z + 1.0 / 11;
  p = p * z + 1.0 / 9;
  p = p * z + 1.0 / 7;
  p = p * z + 1.0 / 5;
  p = p * z + 1.0 / 3;
  const double ln_m = 2.0 * (s + s * (z * p));
  return k * ln2_hi + (ln_m + k * ln2_lo);
}

// sin(pi t) for |t| <= 1/2: the Taylor series of sin x through x^21 on
// |x| <= pi/2 (truncation < 1.4e-18).
inline double sin_pi(double t) noexcept {
  const double x = pi * t;
  const double z = x * x;
  double p = inv_factorial(21);
  p = p * z - inv_factorial(19);
  p = p * z + inv_factorial(17);
  p = p * z - inv_factorial(15);
  p = p * z + inv_factorial(13);
  p = p * z - inv_factorial(11);
  p = p * z + inv_factorial(9);
  p = p * z - inv_factorial(7);
  p = p * z + inv_factorial(5);
  p = p * z - inv_factorial(3);
  return x + x * (z * p);
}

// expm1(r) for |r| <= 0.35: Taylor through r^13 (truncation < 5e-18 relative).
inline double expm1_small(double r) noexcept {
  double p = inv_factorial(13);
  p = p * r + inv_factorial(12);
  p = p * r + inv_factorial(11);
  p = p * r + inv_factorial(10);
  p = p * r + inv_factorial(9);
  p = p * r + inv_factorial(8);
  p = p * r + inv_factorial(7);
  p = p * r + inv_factorial(6);
  p = p * r + inv_factorial(5);
  p = p * r + inv_factorial(4);
  p = p * r + inv_factorial(3);
  p = p * r + inv_factorial(2);
  return r + r * (r * p);
}

// e^y - 1 for y >= 0 (+inf beyond binary64). y = k ln2 + r with |r| <= ln2/2
// (k by the 1.5 * 2^52 rounding trick), then 2^k (1 + expm1 r) - 1 =
// 2^k expm1(r) + (2^k - 1): exact scalings and one rounded sum (for k > 1000,
// where 2^k alone may overflow, 2^k (1 + expm1 r)). 2^k is applied as two
// factors so that k up to 2020 stays inside the exponent range.
inline double expm1_nonneg(double y) noexcept {
  y = select(y < 1400.0, y, 1400.0);  // e^1400 is +inf in binary64 anyway
  const double shifted = y * inv_ln2 + 0x1.8p52;
  const double kd = shifted - 0x1.8p52;
  const std::uint64_t k = std::bit_cast<std::uint64_t>(shifted) & ((std::uint64_t{1} << 51) - 1);
  const double r = (y - kd * ln2_hi) - kd * ln2_lo;
  const double em = expm1_small(r);
  const std::uint64_t k1 = k >> 1, k2 = k - k1;
  const double s1 = std::bit_cast<double>((k1 + 1023) << 52);
  const double s2 = std::bit_cast<double>((k2 + 1023) << 52);
  const double near = s1 * (s2 * em) + (s1 * s2 - 1.0);  // k <= 1000: 2^k is finite
  const double far = s1 * (s2 * (1.0 + em));              // the -1 is below half an ulp; overflows to +inf
  return select(k > 1000, far, near);
}

// e^y for |y| <= 700 (clamped there), by the same reduction.
inline double exp_bounded(double y) noexcept {
  y = y < 700.0 ? y : 700.0;
  y = y > -700.0 ? y : -700.0;
  const double shifted = y * inv_ln2 + 0x1.8p52;
  const double kd = shifted - 0x1.8p52;
  const std::int64_t k = static_cast<std::int64_t>(std::bit_cast<std::uint64_t>(shifted) -
                                                   std::bit_cast<std::uint64_t>(0x1.8p52));
  const double r = (y - kd * ln2_hi) - kd * ln2_lo;
  const double scale = std::bit_cast<double>(static_cast<std::uint64_t>(k + 1023) << 52);
  return scale + scale * expm1_small(r);
}

// ln(1 + q) for q >= 0: Goldberg's formula, ln(u) q / (u - 1) with u = 1 + q
// rounded, accurate to a few ulps given an accurate ln (D. Goldberg, "What
// every computer scientist should know about floating-point arithmetic", ACM
// Computing Surveys 23 (1991), theorem 4).
inline double log1p_nonneg(double q) noexcept {
  const double u = 1.0 + q;
  const double g = log_pos(u) * (q / (u - 1.0));
  return select(u == 1.0, q, g);
}

inline double with_sign_of_bit63(double magnitude, std::uint64_t w) noexcept {
  return std::bit_cast<double>(std::bit_cast<std::uint64_t>(magnitude) | (w & sign_bit));
}

}  // namespace detail

// Standard normal N(0, 1).
inline double gauss(std::uint64_t w) noexcept {
  const double r = std::sqrt(-2.0 * detail::log_pos(detail::open_unit_hi32(w)));
  return r * detail::sin_pi(detail::centered_lo32(w));
}

// Student t with nu > 0 degrees of freedom (variance nu / (nu - 2) for nu > 2).
// two_over_nu = 2 / nu, passed in so that loops hoist the division.
inline double student_t(std::uint64_t w, double nu, double two_over_nu) noexcept {
  const double y = -two_over_nu * detail::log_pos(detail::open_unit_hi32(w));
  return std::sqrt(nu * detail::expm1_nonneg(y)) * detail::sin_pi(detail::centered_lo32(w));
}

// Laplace, unit variance (scale b = 1/sqrt 2).
inline double laplace(std::uint64_t w) noexcept {
  constexpr double b = 0.70710678118654752440;
  return detail::with_sign_of_bit63(-b * detail::log_pos(detail::open_unit_low<52>(w)), w);
}

// Logistic, unit variance (scale s = sqrt 3 / pi). p in (0, 1/2) from 51 bits,
// ln((1 - p) / p) = ln(1 + (1 - 2p) / p), where 1 - 2p is exact.
inline double logistic(std::uint64_t w) noexcept {
  constexpr double s = 0.55132889542179204315;  // sqrt(3) / pi
  const double p = detail::open_unit_low<51>(w);
  return detail::with_sign_of_bit63(s * detail::log1p_nonneg((1.0 - 2.0 * p) / p), w);
}

// Uniform on (-sqrt 3, sqrt 3), unit variance: sqrt(3) ((2m + 1) 2^-52 - 1)
// for m = the top 52 bits.
inline double uniform(std::uint64_t w) noexcept {
  constexpr double sqrt3 = 1.73205080756887729353;
  const double v = std::bit_cast<double>(detail::one_bits | (w >> 12));  // 1 + m 2^-52
  return (2.0 * (v - 1.5) + 0x1p-52) * sqrt3;                            // exact before the scaling
}

// Uniform in (0, 1): (m + 1/2) 2^-52, m = the low 52 bits.
inline double uniform_open01(std::uint64_t w) noexcept { return detail::open_unit_low<52>(w); }

}  // namespace lobit::rng
