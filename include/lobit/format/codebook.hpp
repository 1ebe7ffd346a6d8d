#pragma once
// Codebooks: any sorted set of distinct finite values; code i is the i-th
// smallest value, codes past the last value are unused. Encode is nearest
// value; nearest-even sends a tie to the even code, nearest-away to the larger
// magnitude. Also the normal-quantile generator (the QLoRA paper's
// construction, generalised to b bits).
#include <memory>
#include <vector>

#include "lobit/format/element_format.hpp"
#include "lobit/format/value_table.hpp"

namespace lobit {

class Codebook final : public ElementFormat {
 public:
  // bits = 0: the fewest bits that hold every value. generator: the spec text
  // that produced the values, printed by spec() instead of the value list.
  Codebook(std::vector<double> values, int bits = 0, std::string generator = {});

  const std::vector<double>& values() const { return values_; }
  std::string spec() const override;
  std::string_view family() const override { return "codebook"; }
  int bits() const override { return bits_; }
  double decode(Code code) const override;
  CodeClass classify(Code code) const override;
  Code encode(double x, Rounding r = Rounding::nearest_even, Overflow o = Overflow::format_default,
              std::uint32_t random_word = 0) const override {
    return table_->encode(x, r, o, random_word);
  }
  bool has_infinity() const override { return false; }
  std::optional<Code> nan_code() const override { return std::nullopt; }
  bool has_negative_zero() const override { return false; }
  bool is_signed() const override { return values_.front() < 0; }
  std::optional<VirtualNext> virtual_next_above_max() const override { return std::nullopt; }

 private:
  std::vector<double> values_;
  int bits_ = 0;
  std::string generator_;
  std::unique_ptr<ValueTable> table_;
};

// Normal-quantile levels for b bits, built the QLoRA paper's way (Dettmers et
// al. 2023, section 3 and appendix): 2^(b-1) positive levels at the standard
// normal quantiles of float32 points evenly spaced from `offset` down to 0.5
// (the last point dropped), 2^(b-1)-1 negative levels likewise from a grid
// one point shorter, an exact zero, each level rounded to float32 and the set
// divided in float32 by its largest level, so that it spans [-1, 1].
std::vector<double> normal_quantile_levels(int bits, double offset);

// Default offset for b bits: the mean of 1 - 1/(2(2^b - 1)) and 1 - 1/(2 * 2^b)
// (for b = 4 the paper's 0.9677083, there rounded to 7 digits).
double normal_quantile_default_offset(int bits);

}  // namespace lobit
