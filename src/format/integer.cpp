#include "lobit/format/integer.hpp"

#include <cmath>
#include <fmt/format.h>

#include "lobit/error.hpp"
#include "lobit/format/rounding.hpp"
#include "lobit/format/split.hpp"

namespace lobit {

Integer::Integer(const IntegerParams& p) : p_(p) {
  if (p.bits < 2 || p.bits > 16)
    throw usage_error(fmt::format("bits={} is out of range", p.bits), "int format", "use 2 to 16 bits");
  if (p.frac_bits < 0 || p.frac_bits > 32)
    throw usage_error(fmt::format("frac={} is out of range", p.frac_bits), "int format",
                      "use 0 to 32 fraction bits");
  if (p.symmetric && !p.sign)
    throw usage_error("range=symmetric needs a signed integer", "int format", "drop signed=no");
  if (p.sign) {
    kmax_ = (std::int64_t{1} << (p.bits - 1)) - 1;
    kmin_ = p.symmetric ? -kmax_ : -kmax_ - 1;
  } else {
    kmin_ = 0;
    kmax_ = (std::int64_t{1} << p.bits) - 1;
  }
}

std::string Integer::spec() const {
  std::string s = fmt::format("int+bits={}", p_.bits);
  if (!p_.sign) s += "+signed=no";
  if (p_.symmetric) s += "+range=symmetric";
  if (p_.frac_bits) s += fmt::format("+frac={}", p_.frac_bits);
  return s;
}

CodeClass Integer::classify(Code code) const {
  if (!valid_code(code))
    throw usage_error(fmt::format("code {:#x} is out of range", code), spec(),
                      fmt::format("codes of this format go from 0 to {:#x}", code_count_minus_one()));
  if (p_.symmetric && code == (Code{1} << (p_.bits - 1))) return CodeClass::unused;
  return code == 0 ? CodeClass::zero : CodeClass::normal;
}

double Integer::decode(Code code) const {
  if (classify(code) == CodeClass::unused) return std::numeric_limits<double>::quiet_NaN();
  std::int64_t k = static_cast<std::int64_t>(code);
  if (p_.sign && (code >> (p_.bits - 1))) k -= std::int64_t{1} << p_.bits;
  return std::ldexp(static_cast<double>(k), -p_.frac_bits);
}

std::optional<ElementFormat::VirtualNext> Integer::virtual_next_above_max() const {
  // kmax is odd for every signed layout and for unsigned: the tie would go up.
  return VirtualNext{std::ldexp(static_cast<double>(kmax_ + 1), -p_.frac_bits), (kmax_ & 1) == 1};
}

std::string Integer::describe_code(Code code) const {
  if (classify(code) == CodeClass::unused)
    return "unused: the most negative two's complement pattern, left out for a symmetric range";
  return ElementFormat::describe_code(code);
}

Code Integer::encode(double x, Rounding r, Overflow, std::uint32_t random_word) const {
  // No infinity and no NaN code: every overflow saturates.
  if (std::isnan(x)) throw usage_error("NaN input", spec(), "integer formats have no NaN code; filter NaNs first");
  const bool neg = std::signbit(x);
  const std::int64_t limit = neg ? -kmin_ : kmax_;  // largest magnitude on this side
  if (std::isinf(x)) return code_of(neg ? -limit : limit);
  if (x == 0) return 0;
  const SplitDouble d = split_double(x);
  // |x| * 2^frac = sig * 2^(exp - 52 + frac)
  const int e = d.exp + p_.frac_bits;
  if (e >= 62) return code_of(neg ? -limit : limit);
  std::uint64_t n;
  Remainder rem;
  split_significand(d.sig, 52 - e, n, rem);
  if (52 - e < 0) n = d.sig << (e - 52);
  if (round_away_from_zero(r, neg, rem, (n & 1) != 0, random_word)) ++n;
  const std::int64_t k = static_cast<std::int64_t>(n) > limit ? limit : static_cast<std::int64_t>(n);
  return code_of(neg ? -k : k);
}

}  // namespace lobit
