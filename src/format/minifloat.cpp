#include "lobit/format/minifloat.hpp"

#include <bit>
#include <cmath>
#include <fmt/format.h>

#include "lobit/error.hpp"
#include "lobit/format/rounding.hpp"
#include "lobit/format/split.hpp"

namespace lobit {

std::string_view to_string(SpecialValues s) {
  switch (s) {
    case SpecialValues::ieee: return "ieee";
    case SpecialValues::top_nan: return "top-nan";
    case SpecialValues::neg_zero_nan: return "negzero-nan";
    case SpecialValues::none: return "none";
  }
  return "?";
}

int MinifloatParams::default_bias(int exp_bits, SpecialValues special) {
  int b = exp_bits >= 2 ? (1 << (exp_bits - 1)) - 1 : 0;
  if (special == SpecialValues::neg_zero_nan) ++b;
  return b;
}

Minifloat::Minifloat(const MinifloatParams& p) : p_(p) {
  const std::string where = "float format";
  if (p.exp_bits < 0 || p.exp_bits > 11)
    throw usage_error(fmt::format("exp={} is out of range", p.exp_bits), where, "use 0 to 11 exponent bits");
  if (p.man_bits < 0 || p.man_bits > 52)
    throw usage_error(fmt::format("man={} is out of range", p.man_bits), where, "use 0 to 52 mantissa bits");
  if (p.special == SpecialValues::ieee && p.exp_bits == 0)
    throw usage_error("special=ieee needs an exponent field", where, "use exp>=1 or special=none");
  if (p.special == SpecialValues::neg_zero_nan && !p.sign)
    throw usage_error("special=negzero-nan needs a sign bit", where, "drop sign=no or pick another special layout");
  if (p.exp_bits == 0 && !p.subnormals)
    throw usage_error("exp=0 with subnormals=no has no nonzero value", where, "allow subnormals");

  const int M = p.man_bits;
  man_mask_ = (Code{1} << M) - 1;
  field_max_ = (Code{1} << p.exp_bits) - 1;
  sign_bit_ = p.sign ? Code{1} << (p.exp_bits + M) : 0;
  const Code all_ones = (field_max_ << M) | man_mask_;
  switch (p.special) {
    case SpecialValues::ieee:
      max_mag_ = ((field_max_ - 1) << M) | man_mask_;
      if (M > 0) nan_code_ = (field_max_ << M) | (Code{1} << (M - 1));
      break;
    case SpecialValues::top_nan:
      max_mag_ = all_ones - 1;
      nan_code_ = all_ones;
      break;
    case SpecialValues::neg_zero_nan:
      max_mag_ = all_ones;
      nan_code_ = sign_bit_;
      break;
    case SpecialValues::none: max_mag_ = all_ones; break;
  }
  if (classify(max_mag_) != CodeClass::normal && classify(max_mag_) != CodeClass::subnormal)
    throw usage_error("these parameters leave no nonzero finite value", where,
                      "add exponent or mantissa bits, or change special=");

  // Every value must be exact in binary64.
  const int min_exp = (p.subnormals && M > 0) ? emin() - M : emin();
  if (emax() > 1023 || min_exp < -1074) {
    const int top_field = static_cast<int>(max_mag_ >> M);
    const int lo = top_field - 1023;
    const int hi = (p.subnormals && M > 0) ? 1075 - M : 1075;
    throw usage_error(fmt::format("bias={} puts values outside binary64", p.bias), where,
                      fmt::format("use a bias between {} and {} for exp={} man={}", lo, hi, p.exp_bits, M));
  }
}

std::string Minifloat::spec() const {
  std::string s = fmt::format("float+exp={}+man={}+bias={}", p_.exp_bits, p_.man_bits, p_.bias);
  if (!p_.sign) s += "+sign=no";
  if (!p_.subnormals) s += "+subnormals=no";
  s += fmt::format("+special={}", to_string(p_.special));
  return s;
}

int Minifloat::emax() const {
  const Code field = max_mag_ >> p_.man_bits;
  return field == 0 ? emin() - 1 : static_cast<int>(field) - p_.bias;
}

CodeClass Minifloat::classify(Code code) const {
  if (!valid_code(code))
    throw usage_error(fmt::format("code {:#x} is out of range", code), spec(),
                      fmt::format("codes of this format go from 0 to {:#x}", code_count_minus_one()));
  if (p_.special == SpecialValues::neg_zero_nan && code == sign_bit_) return CodeClass::nan;
  const Code mag = code & ~sign_bit_;
  const Code field = mag >> p_.man_bits;
  const Code mant = mag & man_mask_;
  if (p_.special == SpecialValues::ieee && field == field_max_)
    return mant == 0 ? CodeClass::infinity : CodeClass::nan;
  if (p_.special == SpecialValues::top_nan && mag == ((field_max_ << p_.man_bits) | man_mask_))
    return CodeClass::nan;
  if (field == 0) {
    if (mant == 0) return CodeClass::zero;
    return p_.subnormals ? CodeClass::subnormal : CodeClass::unused;
  }
  return CodeClass::normal;
}

double Minifloat::decode(Code code) const {
  const CodeClass c = classify(code);
  const bool neg = (code & sign_bit_) != 0;
  const Code mag = code & ~sign_bit_;
  double v = 0;
  switch (c) {
    case CodeClass::nan:
    case CodeClass::unused: return std::numeric_limits<double>::quiet_NaN();
    case CodeClass::infinity: v = std::numeric_limits<double>::infinity(); break;
    case CodeClass::zero: v = 0.0; break;
    case CodeClass::subnormal:
      v = std::ldexp(static_cast<double>(mag & man_mask_), emin() - p_.man_bits);
      break;
    case CodeClass::normal: {
      const Code field = mag >> p_.man_bits;
      const double sig = static_cast<double>((Code{1} << p_.man_bits) | (mag & man_mask_));
      v = std::ldexp(sig, static_cast<int>(field) - p_.bias - p_.man_bits);
      break;
    }
  }
  return neg ? -v : v;
}

double Minifloat::max_finite() const { return decode(max_mag_); }
double Minifloat::min_normal() const { return std::ldexp(1.0, emin()); }
std::optional<double> Minifloat::min_subnormal() const {
  if (!p_.subnormals || p_.man_bits == 0) return std::nullopt;
  return std::ldexp(1.0, emin() - p_.man_bits);
}

std::optional<ElementFormat::VirtualNext> Minifloat::virtual_next_above_max() const {
  const Code field = max_mag_ >> p_.man_bits;
  const int quantum = (field == 0 ? emin() : static_cast<int>(field) - p_.bias) - p_.man_bits;
  // The next code up would be max_mag_ + 1: the tie goes to it when that code is even.
  return VirtualNext{max_finite() + std::ldexp(1.0, quantum), (max_mag_ & 1) == 1};
}

std::string Minifloat::describe_code(Code code) const {
  const CodeClass c = classify(code);
  if (c == CodeClass::nan) {
    if (p_.special == SpecialValues::neg_zero_nan) return "NaN: the single NaN, in the place of negative zero";
    if (p_.special == SpecialValues::top_nan) return "NaN: all-ones exponent and mantissa";
    const bool quiet = p_.man_bits > 0 && ((code >> (p_.man_bits - 1)) & 1);
    return quiet ? "NaN (quiet: top mantissa bit set, IEEE 754 section 6.2.1)"
                 : "NaN (signalling: top mantissa bit clear, IEEE 754 section 6.2.1)";
  }
  if (c == CodeClass::unused)
    return "unused: subnormal pattern while subnormals are off (hardware that flushes reads it as zero)";
  return ElementFormat::describe_code(code);
}

Code Minifloat::overflow_result(bool negative, Rounding r, Overflow o) const {
  const Code s = negative ? sign_bit_ : 0;
  if (overflow_goes_beyond(r, negative) && resolve(o) == Overflow::special) {
    if (has_infinity()) return s | (field_max_ << p_.man_bits);
    if (nan_code_) return *nan_code_;
  }
  return s | max_mag_;
}

Code Minifloat::encode_magnitude_of_zero(bool negative) const {
  return (negative && has_negative_zero()) ? sign_bit_ : 0;
}

Code Minifloat::encode(double x, Rounding r, Overflow o, std::uint32_t random_word) const {
  if (std::isnan(x)) {
    if (nan_code_) return *nan_code_;
    throw usage_error("NaN input", spec(), "this format has no NaN code; filter NaNs first");
  }
  const bool neg = std::signbit(x);
  if (neg && !p_.sign) {
    // Unsigned: everything below zero lies under the range [0, max]. It
    // saturates to 0, except where it overflows downward (-inf, or rounding
    // down) under the special policy and the format has a NaN.
    const bool downward = std::isinf(x) || (x != 0 && r == Rounding::down);
    if (downward && resolve(o) == Overflow::special && nan_code_) return *nan_code_;
    return 0;
  }
  if (std::isinf(x)) {
    // Infinity is exact, not an overflow: it stays infinite where it can.
    const Code s = neg ? sign_bit_ : 0;
    if (resolve(o) == Overflow::special) {
      if (has_infinity()) return s | (field_max_ << p_.man_bits);
      if (nan_code_) return *nan_code_;
    }
    return s | max_mag_;
  }
  if (x == 0) return encode_magnitude_of_zero(neg);

  const SplitDouble d = split_double(x);  // |x| = sig * 2^(e-52)
  const int M = p_.man_bits;
  const int lo = emin();
  const bool below_normal = d.exp < lo;
  const bool flush_grid = below_normal && !p_.subnormals;  // grid {0, 2^emin}
  int te = below_normal ? lo : d.exp;
  const int shift = flush_grid ? 52 + (lo - d.exp) : 52 - M + (te - d.exp);
  std::uint64_t n;
  Remainder rem;
  split_significand(d.sig, shift, n, rem);

  bool tie_up;
  if (flush_grid) tie_up = false;  // 0 and the smallest normal both have even codes: tie to zero
  else if (M == 0 && n == 1) tie_up = ((te + p_.bias) & 1) != 0;  // to the even exponent field
  else tie_up = (n & 1) != 0;
  if (round_away_from_zero(r, neg, rem, tie_up, random_word)) ++n;

  Code mag;
  if (flush_grid) {
    mag = n ? (Code{1} << M) : 0;
  } else {
    if (n >> (M + 1)) {  // carried into the next binade
      n >>= 1;
      ++te;
    }
    if (n >> M) {
      const std::int64_t field = std::int64_t{te} + p_.bias;
      if (field > static_cast<std::int64_t>(field_max_)) return overflow_result(neg, r, o);
      mag = (static_cast<Code>(field) << M) | (n & man_mask_);
    } else {
      mag = n;
    }
  }
  if (mag > max_mag_) return overflow_result(neg, r, o);
  if (mag == 0) return encode_magnitude_of_zero(neg);
  return (neg ? sign_bit_ : 0) | mag;
}

}  // namespace lobit
