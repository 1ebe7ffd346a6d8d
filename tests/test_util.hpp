#pragma once
// Helpers shared by the format tests.
#include <cmath>
#include <memory>
#include <vector>

#include "lobit/format/element_format.hpp"
#include "lobit/format/spec.hpp"

namespace lobit::test {

inline std::shared_ptr<const ElementFormat> fmt(const char* spec) { return parse_element(spec); }

// Same value, NaN equal to NaN, and the sign of zero compared.
inline bool same_value(double a, double b) {
  if (std::isnan(a) || std::isnan(b)) return std::isnan(a) && std::isnan(b);
  return a == b && std::signbit(a) == std::signbit(b);
}

inline bool is_finite_class(CodeClass c) {
  return c == CodeClass::zero || c == CodeClass::subnormal || c == CodeClass::normal;
}

inline constexpr Rounding all_roundings[] = {Rounding::nearest_even, Rounding::nearest_away, Rounding::toward_zero,
                                             Rounding::up, Rounding::down, Rounding::stochastic};

}  // namespace lobit::test
