#pragma once
// The generic exact engine for formats of up to 16 bits: the sorted finite
// values, the exact decision threshold between each pair of neighbours with
// the side a tie goes to, and an encoder that works from them alone. Families
// without an arithmetic encoder (power-of-two, codebooks) encode with it; the
// arithmetic encoders are tested against it.
#include <cmath>
#include <optional>
#include <string>
#include <vector>

#include "lobit/format/element_format.hpp"

namespace lobit {

// A midpoint between two doubles is a dyadic rational that may not be a double
// itself: it is held as the nearest double and the sign of the remainder, which
// orders it exactly against every double.
struct Threshold {
  double nearest = 0;   // binary64 value nearest the exact threshold
  int residual = 0;     // sign of (exact - nearest)
  bool tie_to_upper = false;  // nearest-even: a value exactly here goes to the upper neighbour
  bool away_to_upper = false; // nearest-away: likewise

  // -1, 0, +1 as x is below, at or above the exact threshold.
  int compare(double x) const {
    if (x < nearest) return -1;
    if (x > nearest) return 1;
    return residual > 0 ? -1 : (residual < 0 ? 1 : 0);
  }
  bool exact_in_double() const { return residual == 0; }
};

// The exact midpoint of a < b, both finite (Boost.Multiprecision where binary64
// cannot hold it), as decimal text with every digit.
std::string exact_midpoint_decimal(double a, double b);
Threshold midpoint(double a, double b);

// Nearest-even, saturating encode and decode by table, for the hot loops of
// block quantization: the same codes as the format's own encode (tested), with
// a branch-light binary search over the thresholds. Built only where every
// threshold is exact in binary64 (usable() says so).
class NearestTable {
 public:
  explicit NearestTable(const ElementFormat& f);  // f.bits() <= 16
  bool usable() const { return usable_; }
  Code encode(double y) const {
    // i = number of thresholds below y (a fixed-depth search over a table padded
    // to 2^k - 1 entries with +inf), plus one where y sits on a threshold whose
    // tie goes up.
    const double* t = thr_.data();
    std::size_t i = 0;
    for (std::size_t step = first_step_; step; step >>= 1) i += (t[i + step - 1] < y) ? step : 0;
    i += (t[i] == y) & tie_up_[i];
    const Code c = codes_[i];
    return (c == zero_code_ && std::signbit(y) && has_neg_zero_) ? neg_zero_code_ : c;
  }
  double decode(Code c) const { return values_by_code_[c]; }

 private:
  std::vector<double> thr_;
  std::vector<unsigned char> tie_up_;
  std::vector<Code> codes_;
  std::vector<double> values_by_code_;
  Code zero_code_ = ~Code{0};
  bool has_neg_zero_ = false;
  Code neg_zero_code_ = 0;
  std::size_t first_step_ = 0;  // half the padded table size
  bool usable_ = true;
};

class ValueTable {
 public:
  explicit ValueTable(const ElementFormat& f);  // f.bits() <= 16

  const std::vector<double>& values() const { return values_; }  // sorted, distinct, finite
  const std::vector<Code>& codes() const { return codes_; }      // code of each value (+0 for zero)
  // thresholds()[i] lies between values()[i] and values()[i+1].
  const std::vector<Threshold>& thresholds() const { return thresholds_; }
  // Midpoints to the virtual neighbours beyond +max and -max (where the format defines them).
  const std::optional<Threshold>& upper_overflow() const { return upper_overflow_; }
  const std::optional<Threshold>& lower_overflow() const { return lower_overflow_; }

  Code encode(double x, Rounding r, Overflow o, std::uint32_t random_word = 0) const;

  // Index of the value a code decodes to (for finite codes).
  std::size_t index_of_value(double v) const;

 private:
  Code overflow_code(bool negative, Rounding r, Overflow o) const;
  Code zero_code(bool negative) const;

  std::vector<double> values_;
  std::vector<Code> codes_;
  std::vector<Threshold> thresholds_;
  std::optional<Threshold> upper_overflow_, lower_overflow_;
  std::optional<double> upper_virtual_, lower_virtual_;
  std::optional<Code> nan_code_, pos_inf_, neg_inf_, neg_zero_;
  Overflow default_overflow_ = Overflow::saturate;
  std::string spec_;
};

}  // namespace lobit
