#pragma once
// What a designer asks of a format first: its range, resolution and codes.
#include <optional>

#include "lobit/format/element_format.hpp"

namespace lobit {

struct FormatProperties {
  int bits = 0;
  double max_finite = 0;     // largest finite value
  double lowest_finite = 0;  // smallest (most negative) finite value
  std::optional<double> min_normal;     // floats and power-of-two formats only
  std::optional<double> min_subnormal;  // empty where there are none
  double min_positive = 0;
  std::uint64_t distinct_finite = 0;    // +0 and -0 count as one
  double dynamic_range_binades = 0;     // log2(max_finite / min_positive)
  // (next value up - value) / value over neighbouring positive values, taken
  // over the normal range for floats and over all positive values otherwise.
  double rel_spacing_min = 0, rel_spacing_max = 0;
  std::uint64_t nan_codes = 0, infinity_codes = 0, unused_codes = 0;
  std::optional<Code> negative_zero;
};

// Exact for every format: by enumeration up to 16 bits, by closed form for
// wider minifloats. Throws for a wide format without a closed form.
FormatProperties properties(const ElementFormat& f);

// The closed form for minifloats of any width (tested against enumeration).
FormatProperties minifloat_properties_closed_form(const class Minifloat& f);

}  // namespace lobit
