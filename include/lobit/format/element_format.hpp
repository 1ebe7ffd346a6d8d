#pragma once
// The exact core every element format answers to: code count, decode, encode
// with a rounding mode and an overflow policy, classification of each code.
#include <cstdint>
#include <optional>
#include <string>
#include <string_view>

namespace lobit {

using Code = std::uint64_t;

enum class CodeClass { zero, subnormal, normal, infinity, nan, unused };

enum class Rounding {
  nearest_even,  // ties to the neighbour whose code is even (IEEE 754 roundTiesToEven for minifloats)
  nearest_away,  // ties to the larger magnitude
  toward_zero,
  up,            // toward +infinity
  down,          // toward -infinity
  stochastic     // see stochastic_random_bits below
};

// Stochastic rounding, defined bit-exactly: the magnitude's remainder below the
// last kept bit, as a fraction of one spacing, is truncated to this many bits
// (t), a random word R of the same width is added, and the magnitude is rounded
// away from zero exactly when t + R >= 2^stochastic_random_bits.
inline constexpr int stochastic_random_bits = 32;

enum class Overflow {
  format_default,  // saturate where the format has no infinity, special otherwise
  saturate,        // every overflow clamps to the largest finite magnitude
  special          // IEEE 754: overflow gives infinity; without infinity NaN; without NaN, max
};

std::string_view to_string(CodeClass c);
std::string_view to_string(Rounding r);
std::string_view to_string(Overflow o);
std::optional<Rounding> parse_rounding(std::string_view name);
std::optional<Overflow> parse_overflow(std::string_view name);

class ElementFormat {
 public:
  virtual ~ElementFormat() = default;

  // Canonical spec text: parsing it gives back this format exactly.
  virtual std::string spec() const = 0;
  virtual std::string_view family() const = 0;
  virtual int bits() const = 0;
  Code code_count_minus_one() const { return bits() >= 64 ? ~Code{0} : (Code{1} << bits()) - 1; }
  bool valid_code(Code c) const { return c <= code_count_minus_one(); }

  // Exact value of a code (NaN for NaN and unused codes). Throws on a code out of range.
  virtual double decode(Code code) const = 0;
  virtual CodeClass classify(Code code) const = 0;

  // Nearest code under the rounding mode; random_word feeds stochastic rounding.
  // Throws lobit::Error for NaN input where the format has no NaN code.
  virtual Code encode(double x, Rounding rounding = Rounding::nearest_even,
                      Overflow overflow = Overflow::format_default,
                      std::uint32_t random_word = 0) const = 0;

  virtual bool has_infinity() const = 0;
  virtual std::optional<Code> nan_code() const = 0;  // the code NaN inputs map to
  virtual bool has_negative_zero() const = 0;
  virtual bool is_signed() const = 0;

  // The overflow policy that Overflow::format_default stands for.
  Overflow resolve(Overflow o) const {
    if (o != Overflow::format_default) return o;
    return has_infinity() ? Overflow::special : Overflow::saturate;
  }

  // For overflow under nearest rounding: the value the format would have just
  // above its largest finite one if its range went on (max + one spacing), and
  // whether a tie at the midpoint goes up (overflows). Empty: values beyond the
  // top saturate under nearest rounding (codebooks).
  struct VirtualNext {
    double value;
    bool tie_goes_up;
  };
  virtual std::optional<VirtualNext> virtual_next_above_max() const = 0;

  // Human description of what a freed or special code means (for `inspect`).
  virtual std::string describe_code(Code code) const;
};

}  // namespace lobit
