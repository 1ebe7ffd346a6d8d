#pragma once
// Integers and fixed point: b bits (2-16), two's complement or unsigned, the
// full range or the restricted symmetric one, value = k * 2^-frac.
#include "lobit/format/element_format.hpp"

namespace lobit {

struct IntegerParams {
  int bits = 8;
  bool sign = true;        // two's complement; false: unsigned
  bool symmetric = false;  // signed only: -(2^(b-1)-1)..2^(b-1)-1, the most negative code unused
  int frac_bits = 0;       // implicit scale 2^-frac_bits (0-32)
};

class Integer final : public ElementFormat {
 public:
  explicit Integer(const IntegerParams& p);

  const IntegerParams& params() const { return p_; }
  std::string spec() const override;
  std::string_view family() const override { return "int"; }
  int bits() const override { return p_.bits; }
  double decode(Code code) const override;
  CodeClass classify(Code code) const override;
  Code encode(double x, Rounding r = Rounding::nearest_even, Overflow o = Overflow::format_default,
              std::uint32_t random_word = 0) const override;
  bool has_infinity() const override { return false; }
  std::optional<Code> nan_code() const override { return std::nullopt; }
  bool has_negative_zero() const override { return false; }
  bool is_signed() const override { return p_.sign; }
  std::optional<VirtualNext> virtual_next_above_max() const override;
  std::string describe_code(Code code) const override;

  std::int64_t min_int() const { return kmin_; }  // in units of 2^-frac
  std::int64_t max_int() const { return kmax_; }
  Code code_of(std::int64_t k) const { return static_cast<Code>(k) & code_count_minus_one(); }

 private:
  IntegerParams p_;
  std::int64_t kmin_ = 0, kmax_ = 0;
};

}  // namespace lobit
