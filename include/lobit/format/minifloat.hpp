#pragma once
// Minifloats ExMy: sign bit on/off, E exponent bits (0-11), M mantissa bits
// (0-52), any bias that keeps every value inside binary64, subnormals on/off,
// and one of four special-value layouts.
#include "lobit/format/element_format.hpp"

namespace lobit {

enum class SpecialValues {
  ieee,          // top exponent field: +-infinity (mantissa 0) and NaNs (IEEE 754 section 3.4)
  top_nan,       // only all-ones exponent-and-mantissa is NaN (OCP OFP8 E4M3 convention)
  neg_zero_nan,  // no negative zero: its code (sign bit alone) is the single NaN
  none           // every code is a finite number (OCP MX FP6/FP4 elements)
};
std::string_view to_string(SpecialValues s);

struct MinifloatParams {
  int exp_bits = 4;
  int man_bits = 3;
  int bias = 7;
  bool sign = true;
  bool subnormals = true;
  SpecialValues special = SpecialValues::ieee;

  // 2^(E-1)-1 (0 for E < 2); one more for the neg_zero_nan layout.
  static int default_bias(int exp_bits, SpecialValues special);
};

class Minifloat final : public ElementFormat {
 public:
  explicit Minifloat(const MinifloatParams& p);  // throws lobit::Error on impossible parameters

  const MinifloatParams& params() const { return p_; }
  std::string spec() const override;
  std::string_view family() const override { return "float"; }
  int bits() const override { return (p_.sign ? 1 : 0) + p_.exp_bits + p_.man_bits; }
  double decode(Code code) const override;
  CodeClass classify(Code code) const override;
  Code encode(double x, Rounding r = Rounding::nearest_even, Overflow o = Overflow::format_default,
              std::uint32_t random_word = 0) const override;
  bool has_infinity() const override { return p_.special == SpecialValues::ieee; }
  std::optional<Code> nan_code() const override { return nan_code_; }
  bool has_negative_zero() const override { return p_.sign && p_.special != SpecialValues::neg_zero_nan; }
  bool is_signed() const override { return p_.sign; }
  std::optional<VirtualNext> virtual_next_above_max() const override;
  std::string describe_code(Code code) const override;

  // Closed-form properties (valid for every width, also above 16 bits).
  Code max_magnitude_code() const { return max_mag_; }
  double max_finite() const;
  double min_normal() const;                     // smallest positive normal
  std::optional<double> min_subnormal() const;   // empty when subnormals are off
  int emin() const { return 1 - p_.bias; }       // exponent of the smallest normal
  int emax() const;                              // exponent of the largest finite value

 private:
  Code encode_magnitude_of_zero(bool negative) const;
  Code overflow_result(bool negative, Rounding r, Overflow o) const;

  MinifloatParams p_;
  Code sign_bit_ = 0;
  Code field_max_ = 0;   // all-ones exponent field
  Code man_mask_ = 0;
  Code max_mag_ = 0;     // magnitude bits of the largest finite value
  std::optional<Code> nan_code_;
};

}  // namespace lobit
