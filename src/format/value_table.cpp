#include "lobit/format/value_table.hpp"

#include <algorithm>
#include <boost/multiprecision/cpp_bin_float.hpp>
#include <cmath>
#include <fmt/format.h>

#include "lobit/error.hpp"
#include "lobit/format/rounding.hpp"

namespace lobit {

namespace {
// Wide enough to hold the sum of any two doubles exactly (2^1024 down to 2^-1075).
using Exact = boost::multiprecision::number<
    boost::multiprecision::cpp_bin_float<2200, boost::multiprecision::digit_base_2>,
    boost::multiprecision::et_off>;

Exact exact_mid(double a, double b) { return (Exact(a) + Exact(b)) / 2; }

// Nearest double to m and the sign of m - nearest, decided by exact comparisons.
std::pair<double, int> nearest_double(const Exact& m) {
  double h = m.convert_to<double>();
  for (double c : {std::nextafter(h, -INFINITY), std::nextafter(h, INFINITY)}) {
    if (!std::isfinite(c)) continue;
    const Exact dc = abs(Exact(c) - m), dh = abs(Exact(h) - m);
    if (dc < dh || (dc == dh && (std::bit_cast<std::uint64_t>(c) & 1) == 0)) h = c;
  }
  const Exact eh(h);
  return {h, m > eh ? 1 : (m < eh ? -1 : 0)};
}
}  // namespace

Threshold midpoint(double a, double b) {
  Threshold t;
  // Fast path: the sum is exact (TwoSum error 0) and halving it loses nothing.
  const double s = a + b;
  if (std::isfinite(s)) {
    const double bb = s - a;
    const double err = (a - (s - bb)) + (b - bb);
    const double half = std::ldexp(s, -1);
    if (err == 0 && std::ldexp(half, 1) == s) {
      t.nearest = half;
      t.residual = 0;
      return t;
    }
  }
  auto [h, r] = nearest_double(exact_mid(a, b));
  t.nearest = h;
  t.residual = r;
  return t;
}

std::string exact_midpoint_decimal(double a, double b) {
  const Exact m = exact_mid(a, b);
  // A dyadic rational has a finite decimal expansion; print all of it.
  std::string s = m.str(0, std::ios_base::scientific);
  return s;
}

ValueTable::ValueTable(const ElementFormat& f) : spec_(f.spec()) {
  if (f.bits() > 16)
    throw usage_error(fmt::format("a value table needs a format of at most 16 bits, this one has {}", f.bits()),
                      f.spec(), "wide formats use their arithmetic encoder");
  const Code n = Code{1} << f.bits();
  std::vector<std::pair<double, Code>> entries;
  entries.reserve(n);
  for (Code c = 0; c < n; ++c) {
    switch (f.classify(c)) {
      case CodeClass::zero:
        if (std::signbit(f.decode(c))) {
          if (!neg_zero_) neg_zero_ = c;
        } else {
          entries.emplace_back(0.0, c);
        }
        break;
      case CodeClass::subnormal:
      case CodeClass::normal: entries.emplace_back(f.decode(c), c); break;
      case CodeClass::infinity:
        if (f.decode(c) > 0) pos_inf_ = c;
        else neg_inf_ = c;
        break;
      default: break;
    }
  }
  if (entries.empty()) throw Error(Error::Kind::internal, "format has no finite value", f.spec());
  std::stable_sort(entries.begin(), entries.end(),
                   [](auto& x, auto& y) { return x.first < y.first; });
  for (auto& [v, c] : entries) {
    if (!values_.empty() && values_.back() == v) continue;  // keep the first (lowest) code
    values_.push_back(v);
    codes_.push_back(c);
  }
  nan_code_ = f.nan_code();
  default_overflow_ = f.resolve(Overflow::format_default);

  auto tie_side = [&](std::size_t i, Threshold& t) {
    const double lo = values_[i], hi = values_[i + 1];
    const bool lo_even = (codes_[i] & 1) == 0, hi_even = (codes_[i + 1] & 1) == 0;
    if (lo_even != hi_even) t.tie_to_upper = hi_even;
    else t.tie_to_upper = std::fabs(hi) < std::fabs(lo);  // same parity: to the smaller magnitude
    t.away_to_upper = std::fabs(hi) >= std::fabs(lo);
  };
  thresholds_.resize(values_.size() - 1);
  for (std::size_t i = 0; i + 1 < values_.size(); ++i) {
    thresholds_[i] = midpoint(values_[i], values_[i + 1]);
    tie_side(i, thresholds_[i]);
  }
  if (auto vn = f.virtual_next_above_max()) {
    const double top = values_.back();
    upper_virtual_ = vn->value;
    upper_overflow_ = midpoint(top, vn->value);
    upper_overflow_->tie_to_upper = vn->tie_goes_up;
    upper_overflow_->away_to_upper = true;
    if (f.is_signed() && values_.front() == -top) {
      lower_virtual_ = -vn->value;
      lower_overflow_ = midpoint(-vn->value, -top);
      lower_overflow_->tie_to_upper = !vn->tie_goes_up;
      lower_overflow_->away_to_upper = false;
    }
  }
}

NearestTable::NearestTable(const ElementFormat& f) {
  const ValueTable t(f);
  for (const auto& th : t.thresholds()) {
    if (!th.exact_in_double()) usable_ = false;
    thr_.push_back(th.nearest);
    tie_up_.push_back(th.tie_to_upper ? 1 : 0);
  }
  codes_ = t.codes();
  if (thr_.empty()) usable_ = false;
  // Pad to 2^k - 1 thresholds (+inf: never below y) so the search has a fixed depth;
  // one more +inf entry keeps t[i] readable for i = thresholds.
  std::size_t padded = 1;
  while (padded - 1 < thr_.size()) padded <<= 1;
  first_step_ = padded / 2;
  thr_.resize(padded, INFINITY);
  tie_up_.resize(padded, 0);
  codes_.resize(padded, codes_.back());
  const std::size_t zi = t.index_of_value(0.0);
  if (zi < t.values().size() && t.values()[zi] == 0) zero_code_ = t.codes()[zi];
  if (f.has_negative_zero()) has_neg_zero_ = true, neg_zero_code_ = f.encode(-0.0);
  values_by_code_.resize(std::size_t{1} << f.bits());
  for (std::size_t c = 0; c < values_by_code_.size(); ++c) values_by_code_[c] = f.decode(c);
}

std::size_t ValueTable::index_of_value(double v) const {
  auto it = std::lower_bound(values_.begin(), values_.end(), v);
  return static_cast<std::size_t>(it - values_.begin());
}

Code ValueTable::zero_code(bool negative) const {
  const std::size_t i = index_of_value(0.0);
  if (negative && neg_zero_) return *neg_zero_;
  return codes_[i];
}

Code ValueTable::overflow_code(bool negative, Rounding r, Overflow o) const {
  if (o == Overflow::format_default) o = default_overflow_;
  if (overflow_goes_beyond(r, negative) && o == Overflow::special) {
    if (negative && neg_inf_) return *neg_inf_;
    if (!negative && pos_inf_) return *pos_inf_;
    if (nan_code_) return *nan_code_;
  }
  return negative ? codes_.front() : codes_.back();
}

namespace {
// Fraction of the way from the smaller-magnitude neighbour, truncated to 32 bits.
std::uint32_t fraction_top32(double x, double near, double far) {
  const double frac = (std::fabs(x) - std::fabs(near)) / (std::fabs(far) - std::fabs(near));
  const double t = std::floor(std::ldexp(frac, 32));
  if (!(t > 0)) return 0;
  if (t >= 4294967295.0) return 0xffffffffu;
  return static_cast<std::uint32_t>(t);
}
}  // namespace

Code ValueTable::encode(double x, Rounding r, Overflow o, std::uint32_t random_word) const {
  if (std::isnan(x)) {
    if (nan_code_) return *nan_code_;
    throw usage_error("NaN input", spec_, "this format has no NaN code; filter NaNs first");
  }
  if (o == Overflow::format_default) o = default_overflow_;
  const bool neg = std::signbit(x);
  if (std::isinf(x)) {
    if (o == Overflow::special) {
      if (!neg && pos_inf_) return *pos_inf_;
      if (neg && neg_inf_) return *neg_inf_;
      if (nan_code_) return *nan_code_;
    }
    return neg ? codes_.front() : codes_.back();
  }
  const double top = values_.back(), bottom = values_.front();
  // Beyond either end.
  if (x > top || x < bottom) {
    const bool upper = x > top;
    const auto& thr = upper ? upper_overflow_ : lower_overflow_;
    const auto& virt = upper ? upper_virtual_ : lower_virtual_;
    const Code edge = upper ? codes_.back() : codes_.front();
    if (!thr) {
      // No neighbour beyond this end: saturate (an unsigned format below 0, a codebook).
      if (!upper && r == Rounding::down && o == Overflow::special && nan_code_) return *nan_code_;
      return edge;
    }
    const bool beyond_dir = overflow_goes_beyond(r, neg);
    bool over;
    switch (r) {
      case Rounding::nearest_even:
      case Rounding::nearest_away: {
        const int c = thr->compare(x);
        const bool tie_out = r == Rounding::nearest_even ? (upper ? thr->tie_to_upper : !thr->tie_to_upper)
                                                         : true;
        over = upper ? (c > 0 || (c == 0 && tie_out)) : (c < 0 || (c == 0 && tie_out));
        break;
      }
      case Rounding::stochastic: {
        if (upper ? x >= *virt : x <= *virt) over = true;
        else {
          const std::uint32_t t = fraction_top32(x, upper ? top : bottom, *virt);
          over = std::uint64_t{t} + random_word >= (std::uint64_t{1} << 32);
        }
        break;
      }
      default: over = beyond_dir; break;
    }
    return over ? overflow_code(neg, r, o) : edge;
  }
  // Inside: values_[i] <= x < values_[i+1] or x == top.
  auto it = std::upper_bound(values_.begin(), values_.end(), x);
  std::size_t i = static_cast<std::size_t>(it - values_.begin()) - 1;
  if (values_[i] == x) return x == 0 ? zero_code(neg) : codes_[i];
  const double lo = values_[i], hi = values_[i + 1];
  bool take_upper = false;
  switch (r) {
    case Rounding::nearest_even:
    case Rounding::nearest_away: {
      const int c = thresholds_[i].compare(x);
      take_upper = c > 0 || (c == 0 && (r == Rounding::nearest_even ? thresholds_[i].tie_to_upper
                                                                     : thresholds_[i].away_to_upper));
      break;
    }
    case Rounding::toward_zero:
      // A cell that spans zero (no zero value): stay on the input's side.
      take_upper = hi <= 0 ? true : (lo >= 0 ? false : x > 0);
      break;
    case Rounding::up: take_upper = true; break;
    case Rounding::down: take_upper = false; break;
    case Rounding::stochastic: {
      if (lo >= 0 || hi <= 0) {
        const bool upper_is_far = lo >= 0;
        const double near = upper_is_far ? lo : hi, far = upper_is_far ? hi : lo;
        const bool away = std::uint64_t{fraction_top32(x, near, far)} + random_word >= (std::uint64_t{1} << 32);
        take_upper = upper_is_far ? away : !away;
      } else {
        // A cell that spans zero (a codebook without 0): by value, upward.
        const double frac = (x - lo) / (hi - lo);
        const double t = std::floor(std::ldexp(frac, 32));
        const std::uint64_t tt = t <= 0 ? 0 : (t >= 4294967295.0 ? 0xffffffffu : static_cast<std::uint64_t>(t));
        take_upper = tt + random_word >= (std::uint64_t{1} << 32);
      }
      break;
    }
  }
  const std::size_t k = take_upper ? i + 1 : i;
  if (values_[k] == 0) return zero_code(neg);
  return codes_[k];
}

}  // namespace lobit
