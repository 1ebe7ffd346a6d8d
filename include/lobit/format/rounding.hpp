#pragma once
// The one rounding decision every arithmetic encoder shares: given where the
// magnitude lies between two neighbouring grid points, does it go to the one
// farther from zero?
#include <cstdint>

#include "lobit/format/element_format.hpp"

namespace lobit {

struct Remainder {
  int half_cmp = -1;         // remainder compared with half a spacing: -1, 0, +1 (exact: -1)
  bool inexact = false;      // remainder is non-zero
  std::uint32_t top32 = 0;   // remainder as a fraction of a spacing, truncated to 32 bits
};

// negative: sign of the input. tie_up: under nearest-even, whether a tie goes
// to the farther neighbour (its code is the even one).
constexpr bool round_away_from_zero(Rounding r, bool negative, const Remainder& rem, bool tie_up,
                                    std::uint32_t random_word) {
  switch (r) {
    case Rounding::nearest_even: return rem.half_cmp > 0 || (rem.half_cmp == 0 && tie_up);
    case Rounding::nearest_away: return rem.inexact && rem.half_cmp >= 0;
    case Rounding::toward_zero: return false;
    case Rounding::up: return rem.inexact && !negative;
    case Rounding::down: return rem.inexact && negative;
    case Rounding::stochastic:
      return rem.inexact &&
             (std::uint64_t{rem.top32} + std::uint64_t{random_word} >= (std::uint64_t{1} << 32));
  }
  return false;
}

// Whether a rounding that overflowed the largest finite magnitude heads away
// from zero (then IEEE 754 gives infinity) or is pulled back to max.
constexpr bool overflow_goes_beyond(Rounding r, bool negative) {
  switch (r) {
    case Rounding::toward_zero: return false;
    case Rounding::up: return !negative;
    case Rounding::down: return negative;
    default: return true;
  }
}

}  // namespace lobit
