#pragma once
// Exact text of a binary64 value as a hex float; "nan", "inf", "-inf" for the specials.
#include <cmath>
#include <fmt/format.h>
#include <string>

namespace lobit::detail {

inline std::string hex_text(double v) {
  if (std::isnan(v)) return "nan";
  if (std::isinf(v)) return v > 0 ? "inf" : "-inf";
  return fmt::format("{:a}", v);
}

}  // namespace lobit::detail
