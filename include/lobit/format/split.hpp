#pragma once
// Bit-level helpers for arithmetic encoders: a double as integer significand
// and exponent, and the split of a significand at a bit position.
#include <bit>
#include <cstdint>

#include "lobit/format/rounding.hpp"

namespace lobit {

struct SplitDouble {
  std::uint64_t sig;  // in [2^52, 2^53): |x| = sig * 2^(exp - 52)
  int exp;
};

// x finite and non-zero; subnormal doubles are normalised.
inline SplitDouble split_double(double x) {
  const auto bits = std::bit_cast<std::uint64_t>(x);
  const std::uint64_t frac = bits & ((std::uint64_t{1} << 52) - 1);
  const int biased = static_cast<int>((bits >> 52) & 0x7ff);
  if (biased == 0) {
    const int lz = std::countl_zero(frac) - 11;
    return {frac << lz, -1022 - lz};
  }
  return {frac | (std::uint64_t{1} << 52), biased - 1023};
}

// n = sig >> shift; the dropped bits become the remainder (sig < 2^53).
inline void split_significand(std::uint64_t sig, int shift, std::uint64_t& n, Remainder& rem) {
  if (shift <= 0) {
    n = sig;
    rem = {};
  } else if (shift < 64) {
    n = sig >> shift;
    const std::uint64_t r = sig & ((std::uint64_t{1} << shift) - 1);
    const std::uint64_t half = std::uint64_t{1} << (shift - 1);
    rem.half_cmp = r < half ? -1 : (r == half ? 0 : 1);
    rem.inexact = r != 0;
    rem.top32 = static_cast<std::uint32_t>(shift >= 32 ? r >> (shift - 32) : r << (32 - shift));
  } else {
    n = 0;
    rem.half_cmp = -1;
    rem.inexact = true;
    rem.top32 = (shift - 32 < 64) ? static_cast<std::uint32_t>(sig >> (shift - 32)) : 0;
  }
}

}  // namespace lobit
