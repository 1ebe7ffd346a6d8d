#include "lobit/format/element_format.hpp"

#include <array>
#include <utility>

namespace lobit {

std::string_view to_string(CodeClass c) {
  switch (c) {
    case CodeClass::zero: return "zero";
    case CodeClass::subnormal: return "subnormal";
    case CodeClass::normal: return "normal";
    case CodeClass::infinity: return "infinity";
    case CodeClass::nan: return "nan";
    case CodeClass::unused: return "unused";
  }
  return "?";
}

namespace {
constexpr std::array<std::pair<Rounding, std::string_view>, 6> rounding_names{{
    {Rounding::nearest_even, "nearest-even"},
    {Rounding::nearest_away, "nearest-away"},
    {Rounding::toward_zero, "toward-zero"},
    {Rounding::up, "up"},
    {Rounding::down, "down"},
    {Rounding::stochastic, "stochastic"},
}};
constexpr std::array<std::pair<Overflow, std::string_view>, 3> overflow_names{{
    {Overflow::format_default, "default"},
    {Overflow::saturate, "saturate"},
    {Overflow::special, "special"},
}};
}  // namespace

std::string_view to_string(Rounding r) {
  for (auto& [v, n] : rounding_names)
    if (v == r) return n;
  return "?";
}
std::string_view to_string(Overflow o) {
  for (auto& [v, n] : overflow_names)
    if (v == o) return n;
  return "?";
}
std::optional<Rounding> parse_rounding(std::string_view name) {
  for (auto& [v, n] : rounding_names)
    if (n == name) return v;
  return std::nullopt;
}
std::optional<Overflow> parse_overflow(std::string_view name) {
  for (auto& [v, n] : overflow_names)
    if (n == name) return v;
  return std::nullopt;
}

std::string ElementFormat::describe_code(Code code) const {
  switch (classify(code)) {
    case CodeClass::nan: return "NaN";
    case CodeClass::unused: return "unused: no value is assigned to this code";
    case CodeClass::infinity: return decode(code) > 0 ? "+infinity" : "-infinity";
    default: return {};
  }
}

}  // namespace lobit
