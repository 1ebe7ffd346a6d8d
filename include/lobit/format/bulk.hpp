#pragma once
// The span entry point: encode and decode raw buffers (binary64, binary32,
// binary16 / bfloat16 bit patterns). Stochastic rounding draws one random word
// per element from (seed, element index), so results do not depend on how the
// work is split.
#include <cstdint>
#include <span>

#include "lobit/format/element_format.hpp"

namespace lobit {

struct EncodeOptions {
  Rounding rounding = Rounding::nearest_even;
  Overflow overflow = Overflow::format_default;
  std::uint64_t seed = 0;         // stochastic rounding only
  std::uint64_t first_index = 0;  // index of in[0] in the whole tensor
};

// Random word for element i: the upper 32 bits of the (i+1)-th SplitMix64
// output from state `seed` (Steele, Lea and Flood, OOPSLA 2014).
constexpr std::uint32_t stochastic_word(std::uint64_t seed, std::uint64_t i) {
  std::uint64_t z = seed + (i + 1) * 0x9e3779b97f4a7c15ull;
  z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ull;
  z = (z ^ (z >> 27)) * 0x94d049bb133111ebull;
  z ^= z >> 31;
  return static_cast<std::uint32_t>(z >> 32);
}

enum class HalfKind { fp16, bf16 };

// Exact conversions of 16-bit patterns to binary64.
double half_bits_to_double(std::uint16_t bits, HalfKind kind);

void encode(const ElementFormat& f, std::span<const double> in, std::span<Code> out, const EncodeOptions& o = {});
void encode(const ElementFormat& f, std::span<const float> in, std::span<Code> out, const EncodeOptions& o = {});
void encode(const ElementFormat& f, std::span<const std::uint16_t> in, HalfKind kind, std::span<Code> out,
            const EncodeOptions& o = {});

// Decode to binary64 (exact) or binary32 (exact where the value fits, else
// rounded to nearest-even by the conversion).
void decode(const ElementFormat& f, std::span<const Code> in, std::span<double> out);
void decode(const ElementFormat& f, std::span<const Code> in, std::span<float> out);

}  // namespace lobit
