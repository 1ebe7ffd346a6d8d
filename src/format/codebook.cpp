#include "lobit/format/codebook.hpp"

#include <algorithm>
#include <bit>
#include <boost/math/distributions/normal.hpp>
#include <cmath>
#include <fmt/format.h>

#include "lobit/error.hpp"

namespace lobit {

Codebook::Codebook(std::vector<double> values, int bits, std::string generator)
    : values_(std::move(values)), generator_(std::move(generator)) {
  const std::string where = "codebook";
  if (values_.size() < 2 || values_.size() > 65536)
    throw usage_error(fmt::format("a codebook needs 2 to 65536 values, got {}", values_.size()), where);
  for (double v : values_)
    if (!std::isfinite(v)) throw usage_error("codebook values must be finite", where, "remove inf/nan entries");
  for (double& v : values_)
    if (v == 0) v = 0.0;  // one zero, positive
  std::sort(values_.begin(), values_.end());
  for (std::size_t i = 1; i < values_.size(); ++i)
    if (values_[i] == values_[i - 1])
      throw usage_error(fmt::format("value {} appears twice", values_[i]), where, "list each value once");
  const int need = static_cast<int>(std::bit_width(values_.size() - 1));
  if (bits == 0) bits = need;
  if (bits < need || bits > 16)
    throw usage_error(fmt::format("bits={} cannot hold {} values", bits, values_.size()), where,
                      fmt::format("use bits between {} and 16", need));
  bits_ = bits;
  table_ = std::make_unique<ValueTable>(*this);
}

std::string Codebook::spec() const {
  if (!generator_.empty()) return generator_;
  std::string s = "codebook+values=";
  for (std::size_t i = 0; i < values_.size(); ++i) {
    if (i) s += '/';
    s += fmt::format("{}", values_[i]);
  }
  if (bits_ != static_cast<int>(std::bit_width(values_.size() - 1))) s += fmt::format("+bits={}", bits_);
  return s;
}

CodeClass Codebook::classify(Code code) const {
  if (!valid_code(code))
    throw usage_error(fmt::format("code {:#x} is out of range", code), spec(),
                      fmt::format("codes of this format go from 0 to {:#x}", code_count_minus_one()));
  if (code >= values_.size()) return CodeClass::unused;
  return values_[code] == 0 ? CodeClass::zero : CodeClass::normal;
}

double Codebook::decode(Code code) const {
  if (classify(code) == CodeClass::unused) return std::numeric_limits<double>::quiet_NaN();
  return values_[code];
}

double normal_quantile_default_offset(int bits) {
  const double n = std::ldexp(1.0, bits);
  return ((1.0 - 1.0 / (2.0 * (n - 1.0))) + (1.0 - 1.0 / (2.0 * n))) / 2.0;
}

namespace {
// float32 points from start to end inclusive, computed the way the paper's
// reference code gets them (a float32 linspace: the first half counted up from
// start, the second half down from end).
std::vector<float> linspace_f32(float start, float end, int steps) {
  std::vector<float> out(static_cast<std::size_t>(steps));
  const float step = (end - start) / static_cast<float>(steps - 1);
  const int halfway = steps / 2;
  for (int i = 0; i < steps; ++i) {
    volatile float prod = step * static_cast<float>(i < halfway ? i : steps - i - 1);
    out[static_cast<std::size_t>(i)] = i < halfway ? start + prod : end - prod;
  }
  return out;
}
}  // namespace

std::vector<double> normal_quantile_levels(int bits, double offset) {
  if (bits < 2 || bits > 12)
    throw usage_error(fmt::format("bits={} is out of range", bits), "normal-quantile", "use 2 to 12 bits");
  if (!(offset > 0.5 && offset < 1.0))
    throw usage_error(fmt::format("offset={} is out of range", offset), "normal-quantile",
                      "the end quantile must lie strictly between 0.5 and 1");
  const boost::math::normal_distribution<double> normal;
  const int half = 1 << (bits - 1);
  std::vector<float> levels;
  const auto pos = linspace_f32(static_cast<float>(offset), 0.5f, half + 1);
  for (int i = 0; i < half; ++i)
    levels.push_back(static_cast<float>(boost::math::quantile(normal, static_cast<double>(pos[i]))));
  const auto negp = linspace_f32(static_cast<float>(offset), 0.5f, half);
  for (int i = 0; i + 1 < half; ++i)
    levels.push_back(-static_cast<float>(boost::math::quantile(normal, static_cast<double>(negp[i]))));
  levels.push_back(0.0f);
  std::sort(levels.begin(), levels.end());
  const float top = levels.back();
  std::vector<double> out;
  for (float v : levels) {
    volatile float q = v / top;
    out.push_back(static_cast<double>(q));
  }
  return out;
}

}  // namespace lobit
