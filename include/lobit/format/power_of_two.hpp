#pragma once
// Power-of-two (logarithmic) formats: optional sign bit, an exponent field of
// E bits with a bias, an optional zero code (field 0) and an optional NaN code
// (field all ones). E8M0, the OCP Microscaling scale, is the unsigned 8-bit
// one with bias 127, no zero and 0xFF as NaN.
#include <memory>

#include "lobit/format/element_format.hpp"
#include "lobit/format/value_table.hpp"

namespace lobit {

struct PowerOfTwoParams {
  int exp_bits = 4;
  int bias = 7;
  bool sign = true;
  bool zero = true;
  bool nan = false;
};

class PowerOfTwo final : public ElementFormat {
 public:
  explicit PowerOfTwo(const PowerOfTwoParams& p);

  const PowerOfTwoParams& params() const { return p_; }
  std::string spec() const override;
  std::string_view family() const override { return "pow2"; }
  int bits() const override { return (p_.sign ? 1 : 0) + p_.exp_bits; }
  double decode(Code code) const override;
  CodeClass classify(Code code) const override;
  // Nearest in value (the midpoint between 2^k and 2^(k+1) is 1.5 * 2^k).
  Code encode(double x, Rounding r = Rounding::nearest_even, Overflow o = Overflow::format_default,
              std::uint32_t random_word = 0) const override {
    return table_->encode(x, r, o, random_word);
  }
  bool has_infinity() const override { return false; }
  std::optional<Code> nan_code() const override;
  bool has_negative_zero() const override { return p_.sign && p_.zero; }
  bool is_signed() const override { return p_.sign; }
  std::optional<VirtualNext> virtual_next_above_max() const override;
  std::string describe_code(Code code) const override;

  int max_field() const;  // largest field holding a finite value

 private:
  PowerOfTwoParams p_;
  Code field_mask_ = 0;
  std::unique_ptr<ValueTable> table_;
};

}  // namespace lobit
