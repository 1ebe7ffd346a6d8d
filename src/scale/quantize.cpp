#include "lobit/scale/quantize.hpp"

#include <algorithm>
#include <bit>
#include <cmath>
#include <fmt/format.h>
#include <limits>

#include "lobit/error.hpp"
#include "lobit/format/integer.hpp"
#include "lobit/format/properties.hpp"
#include "lobit/format/value_table.hpp"
#include "lobit/measure/fused_kernels.hpp"

namespace lobit {

namespace {
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

std::uint64_t ceil_div(std::uint64_t a, std::uint64_t b) { return (a + b - 1) / b; }

// std::ilogb without the library call for normal numbers (the exponent field);
// zero, subnormals, infinities and NaN go to std::ilogb.
int fast_ilogb(double a) {
  const int e = static_cast<int>((std::bit_cast<std::uint64_t>(a) >> 52) & 0x7ff);
  return (e == 0 || e == 0x7ff) ? std::ilogb(a) : e - 1023;
}

// Exponent range of a power-of-two scale format.
void pow2_range(const ElementFormat& s, int& lo, int& hi) {
  const FormatProperties p = properties(s);
  lo = std::ilogb(p.min_positive);
  hi = std::ilogb(p.max_finite);
}
}  // namespace

GroupSummary summarize(const float* x, std::size_t n, std::size_t stride) {
  GroupSummary s;
  // The vector kernel gives the same summary where it applies (finite inputs,
  // nonzero min and max; see fused_kernels.hpp).
  if (stride == 1 && n >= 8 && fused::have_avx512() && fused::summarize_avx512(x, n, s.amax, s.min, s.max)) return s;
  return summarize_scalar(x, n, stride);
}

GroupSummary summarize_scalar(const float* x, std::size_t n, std::size_t stride) {
  GroupSummary s;
  bool first = true;
  for (std::size_t i = 0; i < n; ++i) {
    const double v = x[i * stride];
    if (!std::isfinite(v)) {
      ++s.nonfinite;
      continue;
    }
    if (first) s.min = s.max = v, first = false;
    s.min = std::min(s.min, v);
    s.max = std::max(s.max, v);
    s.amax = std::max(s.amax, std::fabs(v));
  }
  return s;
}

GroupQuantizer::GroupQuantizer(const ScaledFormat& f, double tensor_scale) : f_(f), tensor_scale_(tensor_scale) {
  emax_value_ = f.element_max_value;
  emax_exp_ = std::ilogb(emax_value_);
  if (f.scale && f.scale->family() == "pow2") pow2_range(*f.scale, scale_lo_exp_, scale_hi_exp_);
  if (f.rule == ScaleRule::mx && f.scale && f.granularity != Granularity::fixed && scale_hi_exp_ >= scale_lo_exp_ &&
      scale_hi_exp_ - scale_lo_exp_ < 4096) {
    // The stored code of every scale 2^e the MX rule can pick (the same encode, done once).
    for (int e = scale_lo_exp_; e <= scale_hi_exp_; ++e) {
      mx_pow_.push_back(std::ldexp(1.0, e));
      mx_codes_.push_back(f.scale->encode(mx_pow_.back(), Rounding::nearest_even, Overflow::saturate));
    }
  }
  // Half a gap beyond each end of the element's values.
  const ElementFormat& e = *f.code_element;
  if (e.bits() <= 16) {
    const ValueTable t(e);
    const auto& v = t.values();
    clip_hi_ = v.back() + (v.back() - v[v.size() - 2]) / 2;
    clip_lo_ = v.front() - (v[1] - v.front()) / 2;
  } else {
    // Wide formats (floats of more than 16 bits): the top value and its neighbour below,
    // found by the format's own encoder rather than a table of 2^bits values.
    const double hi = e.decode(e.encode(INFINITY, Rounding::toward_zero, Overflow::saturate));
    const double below = e.decode(e.encode(std::nextafter(hi, 0.0), Rounding::toward_zero, Overflow::saturate));
    clip_hi_ = hi + (hi - below) / 2;
    const double lo = e.decode(e.encode(-INFINITY, Rounding::toward_zero, Overflow::saturate));
    if (lo < 0) {
      clip_lo_ = lo - (hi - below) / 2;
    } else {  // unsigned: the gap above zero
      const double up = e.decode(e.encode(std::nextafter(0.0, 1.0), Rounding::up, Overflow::saturate));
      clip_lo_ = lo - (up - lo) / 2;
    }
  }
}

GroupScale GroupQuantizer::from_target(double target, const GroupSummary&, Rounding r) const {
  GroupScale g;
  const ElementFormat& sf = *f_.scale;
  if (target == 0) {
    g.scale_code = sf.encode(0.0, Rounding::nearest_even, Overflow::saturate);
    g.scale = sf.decode(g.scale_code) * tensor_scale_;
    return g;
  }
  g.scale_code = sf.encode(target, r, Overflow::saturate);
  double dec = sf.decode(g.scale_code);
  if (!(dec >= 0)) {  // negative or NaN from a signed scale format: never for a positive target
    throw Error(Error::Kind::internal, "scale format returned a negative scale", f_.text);
  }
  g.saturated = dec < target && sf.encode(std::nextafter(dec, INFINITY), Rounding::up, Overflow::saturate) == g.scale_code;
  g.underflow = dec == 0;
  g.scale = dec * tensor_scale_;
  return g;
}

GroupScale GroupQuantizer::choose(const GroupSummary& s, const float* x, std::size_t n, std::size_t stride) const {
  GroupScale g;
  if (f_.granularity == Granularity::fixed) {
    g.scale = f_.fixed_scale;
    return g;
  }
  if (s.nonfinite) {
    g.nan = true;
    g.scale = kNaN;
    if (auto c = f_.scale->nan_code()) g.scale_code = *c;
    return g;
  }
  if (f_.zero) {
    const double lo = std::min(s.min, 0.0), hi = std::max(s.max, 0.0);
    const double target = (hi - lo) / (emax_value_ * tensor_scale_);  // emax_value_: qmax of the unsigned codes
    g = from_target(target, s, Rounding::nearest_even);
    if (g.scale > 0) {
      g.zero_code = f_.zero->encode(-lo / g.scale, Rounding::nearest_even, Overflow::saturate);
      g.zero = f_.zero->decode(g.zero_code);
    }
    return g;
  }
  switch (f_.rule) {
    case ScaleRule::mx: {
      // OCP MX: shared exponent floor(log2(amax)) - emax(element), by ilogb (exact),
      // clamped to the scale format's range. amax = 0 takes the smallest scale.
      const double a = tensor_scale_ == 1.0 ? s.amax : s.amax / tensor_scale_;  // x / 1 == x
      int e = a == 0 ? scale_lo_exp_ : fast_ilogb(a) - emax_exp_;
      if (a != 0 && e > scale_hi_exp_) g.saturated = true;
      e = std::clamp(e, scale_lo_exp_, scale_hi_exp_);
      if (!mx_codes_.empty()) {
        g.scale_code = mx_codes_[static_cast<std::size_t>(e - scale_lo_exp_)];
        g.scale = mx_pow_[static_cast<std::size_t>(e - scale_lo_exp_)] * tensor_scale_;
        return g;
      }
      g.scale_code = f_.scale->encode(std::ldexp(1.0, e), Rounding::nearest_even, Overflow::saturate);
      g.scale = std::ldexp(1.0, e) * tensor_scale_;
      return g;
    }
    case ScaleRule::absmax: return from_target(amax_target(s.amax), s, Rounding::nearest_even);
    case ScaleRule::noclip: {
      GroupScale c = from_target(amax_target(s.amax), s, Rounding::up);
      // Step up until the largest input fits (the quotient above was rounded).
      for (int i = 0; i < 4 && c.scale > 0 && s.amax / c.scale > emax_value_ && !c.saturated; ++i) {
        const double next = std::nextafter(f_.scale->decode(c.scale_code), INFINITY);
        c = from_target(next, s, Rounding::up);
      }
      return c;
    }
    case ScaleRule::mse: {
      if (!x) throw Error(Error::Kind::internal, "rule=mse needs the group's values", f_.text);
      // Clipping ratios 1, 1 - 1/64, ..., 0.5 of amax / max(element); for each, the
      // stored scales just below and just above the target (so that the MX and
      // noclip choices are among the candidates). The least squared error wins;
      // ties keep the earlier candidate (the larger ratio, the lower scale).
      GroupScale best;
      double best_err = INFINITY;
      Code last = ~Code{0};
      for (int j = 0; j <= 32; ++j) {
        const double ratio = 1.0 - j / 64.0;
        const double target = ratio * s.amax / emax_value_ / tensor_scale_;
        for (Rounding r : {Rounding::toward_zero, Rounding::up}) {
          GroupScale c = from_target(target, s, r);
          if (c.scale_code == last) continue;
          last = c.scale_code;
          const double err = quantize(x, n, stride, c, nullptr, nullptr);
          if (err < best_err) best_err = err, best = c;
        }
      }
      return best;
    }
  }
  return g;
}

GroupScale GroupQuantizer::with_scale(double decoded_block_scale, const GroupSummary& s) const {
  GroupScale g;
  if (s.nonfinite) {
    g.nan = true;
    g.scale = kNaN;
    return g;
  }
  g.scale = decoded_block_scale * tensor_scale_;
  g.underflow = decoded_block_scale == 0 && s.amax > 0;
  if (f_.zero && g.scale > 0) {
    const double lo = std::min(s.min, 0.0);
    g.zero_code = f_.zero->encode(-lo / g.scale, Rounding::nearest_even, Overflow::saturate);
    g.zero = f_.zero->decode(g.zero_code);
  }
  return g;
}

void GroupQuantizer::sub_offsets(const float* x, std::size_t n, std::size_t stride, const GroupScale& g,
                                 std::vector<int>& out) const {
  out.clear();
  const int k2 = f_.sub_block;
  const int dmax = (1 << f_.sub_bits) - 1;
  const int shared = std::ilogb(g.scale / tensor_scale_);
  for (std::size_t start = 0; start < n; start += static_cast<std::size_t>(k2)) {
    const std::size_t len = std::min<std::size_t>(static_cast<std::size_t>(k2), n - start);
    double a = 0;
    for (std::size_t i = 0; i < len; ++i) a = std::max(a, std::fabs(static_cast<double>(x[(start + i) * stride])));
    int d = dmax;
    if (a > 0) d = std::clamp(shared - (std::ilogb(a / tensor_scale_) - emax_exp_), 0, dmax);
    // The sub-block scale may not go below the scale format's smallest exponent.
    d = std::min(d, shared - scale_lo_exp_);
    out.push_back(std::max(d, 0));
  }
}

double GroupQuantizer::quantize(const float* x, std::size_t n, std::size_t stride, const GroupScale& g, Code* codes,
                                double* values, std::size_t* clipped) const {
  std::size_t clip = 0;
  const double chi = clip_hi_, clo = clip_lo_;
  const ElementFormat& e = *f_.code_element;
  if (g.nan) {
    for (std::size_t i = 0; i < n; ++i) {
      if (codes) codes[i] = e.nan_code().value_or(0);
      if (values) values[i] = kNaN;
    }
    return kNaN;
  }
  double err = 0;
  if (!(g.scale > 0)) {  // a zero scale: everything is zero
    const Code z = f_.zero ? g.zero_code : e.encode(0.0);
    for (std::size_t i = 0; i < n; ++i) {
      const double v = x[i * stride];
      if (codes) codes[i] = z;
      if (values) values[i] = 0.0;
      err += v * v;
    }
    return err;
  }
  thread_local std::vector<int> offs;
  if (f_.sub_block) sub_offsets(x, n, stride, g, offs);
  const NearestTable* table = f_.element_table.get();
  const double zero = g.zero;
  if (f_.granularity == Granularity::fixed) {
    // No group to mark NaN: a NaN or infinity takes the element's NaN code
    // (code 0 where it has none) and the value NaN, and adds no error.
    bool any = false;
    for (std::size_t i = 0; i < n && !any; ++i) any = !std::isfinite(x[i * stride]);
    if (any) {
      for (std::size_t i = 0; i < n; ++i) {
        const double v = x[i * stride];
        if (std::isfinite(v)) {
          const Code c = e.encode(v / g.scale, Rounding::nearest_even, Overflow::saturate);
          const double q = g.scale * e.decode(c);
          if (codes) codes[i] = c;
          if (values) values[i] = q;
          err += (q - v) * (q - v);
          const double y = v / g.scale;
          clip += (y > chi) | (y < clo);
        } else {
          if (codes) codes[i] = e.nan_code().value_or(0);
          if (values) values[i] = kNaN;
        }
      }
      if (clipped) *clipped += clip;
      return err;
    }
  }
  if (table && !f_.sub_block) {
    // The hot path: one scale for the group, the table encoder.
    const double s = g.scale;
    if (f_.zero) {
      for (std::size_t i = 0; i < n; ++i) {
        const double v = x[i * stride];
        const double y = v / s + zero;
        clip += (y > chi) | (y < clo);
        const Code c = table->encode(y);
        const double q = s * (table->decode(c) - zero);
        if (codes) codes[i] = c;
        if (values) values[i] = q;
        err += (q - v) * (q - v);
      }
    } else {
      int sexp = 0;
      const bool pow2 = std::isfinite(s) && std::frexp(s, &sexp) == 0.5 && sexp > -1000 && sexp < 1000;
      const double inv = pow2 ? 1.0 / s : 0.0;  // exact: x * inv is then x / s to the bit
      for (std::size_t i = 0; i < n; ++i) {
        const double v = x[i * stride];
        const double y = pow2 ? v * inv : v / s;
        clip += (y > chi) | (y < clo);
        const Code c = table->encode(y);
        const double q = s * table->decode(c);
        if (codes) codes[i] = c;
        if (values) values[i] = q;
        err += (q - v) * (q - v);
      }
    }
    if (clipped) *clipped += clip;
    return err;
  }
  for (std::size_t i = 0; i < n; ++i) {
    const double v = x[i * stride];
    double s = g.scale;
    if (f_.sub_block) s = std::ldexp(s, -offs[i / static_cast<std::size_t>(f_.sub_block)]);
    const double y = f_.zero ? v / s + zero : v / s;  // no "+ 0": it would turn -0 into +0
    clip += (y > chi) | (y < clo);
    const Code c = table ? table->encode(y) : e.encode(y, Rounding::nearest_even, Overflow::saturate);
    const double d = table ? table->decode(c) : e.decode(c);
    const double q = f_.zero ? s * (d - zero) : s * d;
    if (codes) codes[i] = c;
    if (values) values[i] = q;
    err += (q - v) * (q - v);
  }
  if (clipped) *clipped += clip;
  return err;
}

double two_level_tensor_scale(const ScaledFormat& f, double tensor_amax) {
  if (!f.tensor_scale) return 1.0;
  if (!(tensor_amax > 0) || !std::isfinite(tensor_amax)) return 1.0;
  const double smax = properties(*f.scale).max_finite;
  const double target = tensor_amax / (lobit::element_max(*f.element) * smax);
  const double s = f.tensor_scale->decode(f.tensor_scale->encode(target, Rounding::nearest_even, Overflow::saturate));
  return s > 0 ? s : 1.0;
}

// ---------------------------------------------------------------- plans

PlanBuilder::PlanBuilder(const ScaledFormat& f, std::uint64_t rows, std::uint64_t cols, int axis) : f_(f) {
  if (rows == 0 || cols == 0) throw usage_error("the tensor is empty", f.text);
  if (axis != 0 && axis != 1) throw usage_error(fmt::format("axis {} of a 2-D tensor", axis), f.text, "use axis 0 or 1");
  p_.rows = rows;
  p_.cols = cols;
  p_.axis = axis;
  switch (f.granularity) {
    case Granularity::fixed: p_.group_count = 1; break;
    case Granularity::tensor: p_.group_count = 1; break;
    case Granularity::row: p_.group_count = rows; break;
    case Granularity::col: p_.group_count = cols; break;
    case Granularity::block: {
      const std::uint64_t along = axis == 1 ? cols : rows, across = axis == 1 ? rows : cols;
      p_.blocks_along = ceil_div(along, static_cast<std::uint64_t>(f.block));
      p_.ragged = along % static_cast<std::uint64_t>(f.block) != 0;
      if (p_.ragged && !f.allow_ragged)
        throw usage_error(fmt::format("block size {} does not divide the {} elements along axis {}", f.block, along, axis),
                          f.text, "pick a block size that divides it, or drop ragged=refuse to allow a short last block");
      p_.group_count = across * p_.blocks_along;
      break;
    }
  }
  needs_data_ = f.granularity == Granularity::tensor || f.granularity == Granularity::col || f.tensor_scale ||
                f.scales;
  if (f.granularity == Granularity::col) p_.col_summary.assign(cols, GroupSummary{});
  if (f.scales) first_level_.assign(p_.group_count, 0.0);
  if (f.scales && f.tensor_scale)
    throw usage_error("tensor-scale= and scales= together are not supported", f.text, "use one of them");
}

void PlanBuilder::add_rows(std::uint64_t row0, std::uint64_t nrows, const float* data) {
  const std::uint64_t cols = p_.cols;
  const GroupSummary chunk = summarize(data, nrows * cols, 1);
  p_.tensor_amax = std::max(p_.tensor_amax, chunk.amax);
  if (f_.granularity == Granularity::tensor) {
    GroupSummary& t = p_.tensor_summary;
    const bool first = row0 == 0;
    t.min = first ? chunk.min : std::min(t.min, chunk.min);
    t.max = first ? chunk.max : std::max(t.max, chunk.max);
    t.amax = std::max(t.amax, chunk.amax);
    t.nonfinite += chunk.nonfinite;
  }
  if (f_.granularity == Granularity::col) {
    for (std::uint64_t c = 0; c < cols; ++c) {
      const GroupSummary s = summarize(data + c, nrows, cols);
      GroupSummary& t = p_.col_summary[c];
      const bool first = row0 == 0;
      t.min = first ? s.min : std::min(t.min, s.min);
      t.max = first ? s.max : std::max(t.max, s.max);
      t.amax = std::max(t.amax, s.amax);
      t.nonfinite += s.nonfinite;
    }
  }
  if (f_.scales) {
    // First-level scales (rule as given, no tensor scale) by group index.
    TensorPlan bare = p_;
    bare.dq_scales.clear();
    ScaledFormat first = f_;
    first.scales = nullptr;
    quantize_rows(first, bare, row0, nrows, data, [&](const GroupView& g) {
      first_level_[g.index] = g.scale->nan ? 0.0 : g.scale->scale;
    });
  }
}

TensorPlan PlanBuilder::finish() {
  p_.tensor_scale = two_level_tensor_scale(f_, p_.tensor_amax);
  if (f_.scales) {
    // The first-level scales, a 1 x groups vector, quantized by the nested format.
    std::vector<float> sv(first_level_.begin(), first_level_.end());
    for (std::size_t i = 0; i < sv.size(); ++i)
      if (static_cast<double>(sv[i]) != first_level_[i])
        throw usage_error("double quantization needs first-level scales exact in float32", f_.text,
                          "use a float32 (or narrower) first-level scale format");
    QuantizedTensor nested = quantize_tensor(*f_.scales, sv, 1, sv.size(), 1);
    p_.dq_scales = std::move(nested.values);
  }
  return p_;
}

namespace detail {

void quantize_rows_impl(const ScaledFormat& f, const TensorPlan& plan, std::uint64_t row0, std::uint64_t nrows,
                        const float* data, void* ctx, GroupFn fn, bool raw) {
  const GroupQuantizer q(f, plan.tensor_scale);
  const std::uint64_t cols = plan.cols;
  std::vector<Code> codes;
  std::vector<double> values;
  auto run = [&](std::uint64_t index, const float* x, std::size_t n, std::size_t stride, const GroupSummary* known) {
    if (!raw) {
      codes.resize(n);
      values.resize(n);
    }
    GroupScale g;
    if (f.scales) {
      const GroupSummary s = summarize(x, n, stride);
      g = q.with_scale(plan.dq_scales.at(index), s);
    } else {
      const GroupSummary s = known ? *known : summarize(x, n, stride);
      g = q.choose(s, x, n, stride);
    }
    if (raw) {
      fn(ctx, GroupView{index, x, n, stride, nullptr, nullptr, &g, 0, &q});
      return;
    }
    std::size_t clipped = 0;
    q.quantize(x, n, stride, g, codes.data(), values.data(), &clipped);
    fn(ctx, GroupView{index, x, n, stride, codes.data(), values.data(), &g, clipped, &q});
  };
  switch (f.granularity) {
    case Granularity::fixed:
      for (std::uint64_t r = 0; r < nrows; ++r) run(0, data + r * cols, cols, 1, nullptr);
      break;
    case Granularity::tensor:
      for (std::uint64_t r = 0; r < nrows; ++r) run(0, data + r * cols, cols, 1, &plan.tensor_summary);
      break;
    case Granularity::row:
      for (std::uint64_t r = 0; r < nrows; ++r) run(row0 + r, data + r * cols, cols, 1, nullptr);
      break;
    case Granularity::col:
      for (std::uint64_t c = 0; c < cols; ++c) run(c, data + c, nrows, cols, &plan.col_summary[c]);
      break;
    case Granularity::block: {
      const std::uint64_t k = static_cast<std::uint64_t>(f.block);
      if (plan.axis == 1) {
        for (std::uint64_t r = 0; r < nrows; ++r)
          for (std::uint64_t j = 0; j < plan.blocks_along; ++j) {
            const std::uint64_t start = j * k, len = std::min(k, cols - start);
            run((row0 + r) * plan.blocks_along + j, data + r * cols + start, len, 1, nullptr);
          }
      } else {
        if (row0 % k != 0 || (nrows % k != 0 && row0 + nrows != plan.rows))
          throw Error(Error::Kind::internal, "axis-0 blocks split across row chunks", f.text);
        for (std::uint64_t b = 0; b * k < nrows; ++b) {
          const std::uint64_t len = std::min(k, nrows - b * k);
          const std::uint64_t block_row = row0 / k + b;
          for (std::uint64_t c = 0; c < cols; ++c)
            run(block_row * cols + c, data + b * k * cols + c, len, cols, nullptr);
        }
      }
      break;
    }
  }
}

}  // namespace detail

QuantizedTensor quantize_tensor(const ScaledFormat& f, std::span<const float> data, std::uint64_t rows,
                                std::uint64_t cols, int axis) {
  if (data.size() != rows * cols)
    throw usage_error(fmt::format("{} values for a {} x {} tensor", data.size(), rows, cols), f.text);
  PlanBuilder pb(f, rows, cols, axis);
  pb.add_rows(0, rows, data.data());
  const TensorPlan plan = pb.finish();
  QuantizedTensor out;
  out.codes.resize(data.size());
  out.values.resize(data.size());
  out.tensor_scale = plan.tensor_scale;
  out.groups = plan.group_count;
  out.scales.assign(plan.group_count, 0.0);
  out.scale_codes.assign(plan.group_count, 0);
  if (f.zero) out.zeros.assign(plan.group_count, 0.0);
  const bool one_scale = f.granularity == Granularity::fixed || f.granularity == Granularity::tensor;
  quantize_rows_dense(f, plan, 0, rows, data.data(), out.codes.data(), out.values.data(), [&](const GroupView& g) {
    const std::uint64_t gi = one_scale ? 0 : g.index;
    out.scales[gi] = g.scale->scale;
    out.scale_codes[gi] = g.scale->scale_code;
    if (f.zero) out.zeros[gi] = g.scale->zero;
    out.saturated_groups += g.scale->saturated;
    out.underflow_groups += g.scale->underflow;
    out.nan_groups += g.scale->nan;
  });
  return out;
}

}  // namespace lobit
