#include "lobit/format/power_of_two.hpp"

#include <cmath>
#include <fmt/format.h>

#include "lobit/error.hpp"

namespace lobit {

PowerOfTwo::PowerOfTwo(const PowerOfTwoParams& p) : p_(p) {
  const std::string where = "pow2 format";
  if (p.exp_bits < 1 || p.exp_bits + (p.sign ? 1 : 0) > 16)
    throw usage_error(fmt::format("exp={} is out of range", p.exp_bits), where,
                      "use 1 to 15 exponent bits (16 bits in all at most)");
  field_mask_ = (Code{1} << p.exp_bits) - 1;
  const int first = p.zero ? 1 : 0;
  if (max_field() < first)
    throw usage_error("these parameters leave no nonzero finite value", where, "add exponent bits");
  const int lo = first - p.bias, hi = max_field() - p.bias;
  if (lo < -1074 || hi > 1023)
    throw usage_error(fmt::format("bias={} puts values outside binary64", p.bias), where,
                      fmt::format("use a bias between {} and {}", max_field() - 1023, first + 1074));
  table_ = std::make_unique<ValueTable>(*this);
}

int PowerOfTwo::max_field() const { return static_cast<int>(field_mask_) - (p_.nan ? 1 : 0); }

std::string PowerOfTwo::spec() const {
  std::string s = fmt::format("pow2+exp={}+bias={}", p_.exp_bits, p_.bias);
  if (!p_.sign) s += "+sign=no";
  if (!p_.zero) s += "+zero=no";
  if (p_.nan) s += "+nan=yes";
  return s;
}

CodeClass PowerOfTwo::classify(Code code) const {
  if (!valid_code(code))
    throw usage_error(fmt::format("code {:#x} is out of range", code), spec(),
                      fmt::format("codes of this format go from 0 to {:#x}", code_count_minus_one()));
  const Code field = code & field_mask_;
  if (p_.nan && field == field_mask_) return CodeClass::nan;
  if (p_.zero && field == 0) return CodeClass::zero;
  return CodeClass::normal;
}

double PowerOfTwo::decode(Code code) const {
  const CodeClass c = classify(code);
  if (c == CodeClass::nan) return std::numeric_limits<double>::quiet_NaN();
  const bool neg = p_.sign && (code >> p_.exp_bits);
  const double v = c == CodeClass::zero ? 0.0 : std::ldexp(1.0, static_cast<int>(code & field_mask_) - p_.bias);
  return neg ? -v : v;
}

std::optional<Code> PowerOfTwo::nan_code() const {
  if (!p_.nan) return std::nullopt;
  return field_mask_;
}

std::optional<ElementFormat::VirtualNext> PowerOfTwo::virtual_next_above_max() const {
  const int mf = max_field();
  // The virtual next field is mf + 1: a tie goes there when it is even.
  return VirtualNext{std::ldexp(1.0, mf + 1 - p_.bias), (mf & 1) == 1};
}

std::string PowerOfTwo::describe_code(Code code) const {
  if (classify(code) == CodeClass::nan) return "NaN: all-ones exponent field";
  return ElementFormat::describe_code(code);
}

}  // namespace lobit
