#include "lobit/format/properties.hpp"

#include <algorithm>
#include <cmath>

#include "lobit/error.hpp"
#include "lobit/format/minifloat.hpp"
#include "lobit/format/value_table.hpp"

namespace lobit {

namespace {
FormatProperties by_enumeration(const ElementFormat& f) {
  FormatProperties p;
  p.bits = f.bits();
  const ValueTable t(f);
  const auto& v = t.values();
  p.max_finite = v.back();
  p.lowest_finite = v.front();
  p.distinct_finite = v.size();
  const Code n = Code{1} << f.bits();
  std::optional<double> min_norm, min_sub;
  for (Code c = 0; c < n; ++c) {
    switch (f.classify(c)) {
      case CodeClass::nan: ++p.nan_codes; break;
      case CodeClass::infinity: ++p.infinity_codes; break;
      case CodeClass::unused: ++p.unused_codes; break;
      case CodeClass::zero:
        if (std::signbit(f.decode(c))) p.negative_zero = c;
        break;
      case CodeClass::subnormal: {
        const double a = std::fabs(f.decode(c));
        if (!min_sub || a < *min_sub) min_sub = a;
        break;
      }
      case CodeClass::normal: {
        const double a = std::fabs(f.decode(c));
        if (a > 0 && (!min_norm || a < *min_norm)) min_norm = a;
        break;
      }
    }
  }
  const bool floatlike = f.family() == "float" || f.family() == "pow2";
  if (floatlike) p.min_normal = min_norm;
  p.min_subnormal = min_sub;
  auto first_pos = std::upper_bound(v.begin(), v.end(), 0.0);
  p.min_positive = first_pos != v.end() ? *first_pos : 0.0;
  if (p.min_positive > 0 && p.max_finite > 0)
    p.dynamic_range_binades = std::log2(p.max_finite) - std::log2(p.min_positive);
  const double from = (floatlike && min_norm) ? *min_norm : p.min_positive;
  bool any = false;
  for (std::size_t i = 0; i + 1 < v.size(); ++i) {
    if (v[i] <= 0 || v[i] < from) continue;
    const double r = (v[i + 1] - v[i]) / v[i];
    if (!any) p.rel_spacing_min = p.rel_spacing_max = r, any = true;
    p.rel_spacing_min = std::min(p.rel_spacing_min, r);
    p.rel_spacing_max = std::max(p.rel_spacing_max, r);
  }
  return p;
}
}  // namespace

FormatProperties minifloat_properties_closed_form(const Minifloat& f) {
  const MinifloatParams& mp = f.params();
  const int M = mp.man_bits;
  const double sides = mp.sign ? 2.0 : 1.0;
  FormatProperties p;
  p.bits = f.bits();
  p.max_finite = f.max_finite();
  p.lowest_finite = mp.sign ? -p.max_finite : 0.0;
  const Code max_mag = f.max_magnitude_code();
  const Code top_field = max_mag >> M;
  const Code sub_patterns = (Code{1} << M) - 1;
  if (top_field >= 1) p.min_normal = f.min_normal();
  p.min_subnormal = f.min_subnormal();
  p.min_positive = p.min_subnormal ? *p.min_subnormal : f.decode(mp.subnormals ? 1 : (Code{1} << M));
  if (!p.min_subnormal && top_field == 0) p.min_positive = f.decode(1);
  const std::uint64_t finite_mags = max_mag + 1 - (mp.subnormals ? 0 : sub_patterns);
  p.distinct_finite = mp.sign ? 2 * finite_mags - 1 : finite_mags;
  switch (mp.special) {
    case SpecialValues::ieee:
      p.nan_codes = static_cast<std::uint64_t>(sides) * sub_patterns;
      p.infinity_codes = static_cast<std::uint64_t>(sides);
      break;
    case SpecialValues::top_nan: p.nan_codes = static_cast<std::uint64_t>(sides); break;
    case SpecialValues::neg_zero_nan: p.nan_codes = 1; break;
    case SpecialValues::none: break;
  }
  if (!mp.subnormals) p.unused_codes = static_cast<std::uint64_t>(sides) * sub_patterns;
  if (f.has_negative_zero()) p.negative_zero = Code{1} << (mp.exp_bits + M);
  p.dynamic_range_binades = std::log2(p.max_finite) - std::log2(p.min_positive);

  // Relative spacing over the normal range (over all positive values when
  // there is no normal range).
  const double ulp_rel_start = std::ldexp(1.0, -M);  // at 1.000..: 2^-M / 1
  std::vector<double> cands_min, cands_max;
  if (top_field >= 1) {
    const Code top_mant = max_mag & sub_patterns;
    const Code normal_fields = top_field;  // fields 1..top_field
    const double ulp = std::ldexp(1.0, -M);
    // In every complete binade, pairs run from 1.0 (ratio 2^-M) to (2 - 2^-M) -> 2 (the smallest).
    if (normal_fields >= 2) {
      cands_max.push_back(ulp_rel_start);
      cands_min.push_back(ulp / (2.0 - ulp));
    }
    // The top binade holds mantissas 0 .. top_mant.
    if (top_mant >= 1) {
      cands_max.push_back(ulp_rel_start);
      cands_min.push_back(ulp / (1.0 + static_cast<double>(top_mant - 1) * ulp));
    }
    if (M == 0 && normal_fields >= 2) cands_min.push_back(1.0), cands_max.push_back(1.0);
  } else {
    // Only subnormal-grid values k * q, k = 1 .. top: ratios 1/k.
    const double top = static_cast<double>(max_mag);
    if (top >= 2) {
      cands_max.push_back(1.0);
      cands_min.push_back(1.0 / (top - 1.0));
    }
  }
  if (!cands_min.empty()) {
    p.rel_spacing_min = *std::min_element(cands_min.begin(), cands_min.end());
    p.rel_spacing_max = *std::max_element(cands_max.begin(), cands_max.end());
  }
  return p;
}

FormatProperties properties(const ElementFormat& f) {
  if (f.bits() <= 16) return by_enumeration(f);
  if (auto* mf = dynamic_cast<const Minifloat*>(&f)) return minifloat_properties_closed_form(*mf);
  throw usage_error("properties of formats wider than 16 bits are only known for floats", f.spec());
}

}  // namespace lobit
