#pragma once
// The exact mean squared error of a scalar format at a fixed scale, for a
// zero-mean unit-variance input density, and the scale that minimises it.
//
// The quantizer is x -> scale * decode(encode(x / scale, nearest_even,
// Overflow::saturate)), taken in real arithmetic (x / scale is not rounded).
// It maps every x to the nearest of the points scale * v over the format's
// finite values v; inputs beyond the largest (smallest) value saturate to it.
// The value table gives the sorted values, and the decision thresholds are the
// exact midpoints of neighbours (tie sides do not matter for a continuous
// density). The MSE is a sum over cells: for the cell of value v between
// thresholds a and b (a = -inf for the lowest value, b = +inf for the highest),
//
//   E = integral_a^b (x - s v)^2 p(x) dx = M2 - 2 s v M1 + s^2 v^2 M0,
//
// with M0, M1, M2 the partial moments of the density over [a, b] in closed
// form. They are evaluated in 50-digit arithmetic (Boost.Multiprecision with
// Boost.Math erfc / exp), never as a difference of CDFs in binary64; see
// src/measure/exact_error.cpp for the error analysis.
#include <optional>
#include <span>
#include <string_view>

#include "lobit/format/element_format.hpp"

namespace lobit {

// Zero mean, unit variance: the standard normal; the Laplace density with
// b = 1/sqrt(2), p(x) = exp(-sqrt(2)|x|) / sqrt(2); uniform on [-sqrt 3, sqrt 3].
enum class Density { gauss, laplace, uniform };

std::string_view to_string(Density d);                     // "gauss", "laplace", "uniform"
std::optional<Density> parse_density(std::string_view name);

struct ExactError {
  double mse = 0;               // E[(x - q(x))^2]
  double signal_power = 1;      // E[x^2] (unit variance)
  double sqnr_db = 0;           // 10 log10(signal_power / mse)
  double clip_probability = 0;  // P(x > scale * max) + P(x < scale * lowest): inputs the saturation clips
  double zero_probability = 0;  // P(q(x) = 0): the cell of the value 0 (0 where the format has no zero)
};

// Throws lobit::Error (usage) for a format wider than 16 bits, and for a scale
// that is not finite and positive. Cost: ~10-100 us per value of the format
// for the Gaussian (50-digit erfc), less for the others; 1-7 s for a 16-bit
// format.
ExactError exact_mse(const ElementFormat& f, Density d, double scale);

// The same for the nearest-value saturating quantizer on scale * levels, where
// levels are sorted, distinct and finite (a format's values, a codebook, a
// uniform grid). exact_mse(f, ...) is this on ValueTable(f).values().
ExactError exact_mse_levels(std::span<const double> levels, Density d, double scale);

struct OptimalScale {
  double scale = 0;
  ExactError error;  // exact_mse at `scale`
};

// The scale minimising exact_mse. MSE(scale) is smooth but not unimodal for
// coarse formats, and for floating-point ones it has a local minimum at every
// factor of 2 in the scale, all equal to ~1e-6. So a log grid of 401 points
// over 8 decades around (density reach / amax) is scanned with a fast binary64
// quadrature of the same integrals (relative accuracy ~1e-13), every grid
// minimum within 5% of the best is refined (up to 64) on the derivative
// dMSE/dscale, and the winner is polished on the exact 50-digit derivative:
// its root is bracketed within 1e-10 relative and one regula falsi step taken
// (so the scale is good to far better than 1e-10). `error` is exact_mse at
// the returned scale. Minima equal to within ~1e-13 count as ties (one of them
// is returned). Cost: three exact evaluations plus the scan; a few ms to 0.1 s
// for formats of up to 8 bits, ~10 s for 16-bit ones.
// Throws lobit::Error (usage) where the scan finds no interior minimum (not
// expected for any set of two or more values: MSE -> 1 as scale -> 0).
OptimalScale optimal_scale(const ElementFormat& f, Density d);
OptimalScale optimal_scale_levels(std::span<const double> levels, Density d);

}  // namespace lobit
