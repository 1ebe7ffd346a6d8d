#include "lobit/measure/metrics.hpp"

#include <algorithm>
#include <bit>
#include <cmath>

#include "lobit/format/value_table.hpp"

namespace lobit {

void ErrorSums::merge(const ErrorSums& o) {
  n += o.n;
  nonzero += o.nonzero;
  clipped += o.clipped;
  zeroed += o.zeroed;
  nonfinite += o.nonfinite;
  nan_outputs += o.nan_outputs;
  sum_x += o.sum_x;
  sum_x2 += o.sum_x2;
  sum_err2 += o.sum_err2;
  sum_rel += o.sum_rel;
  max_abs_err = std::max(max_abs_err, o.max_abs_err);
  max_abs_x = std::max(max_abs_x, o.max_abs_x);
  top_n += o.top_n;
  top_err2 += o.top_err2;
  units += o.units;
  u_e += o.u_e;
  u_e2 += o.u_e2;
  u_n += o.u_n;
  u_n2 += o.u_n2;
  u_en += o.u_en;
  groups += o.groups;
  saturated_groups += o.saturated_groups;
  underflow_groups += o.underflow_groups;
  nan_groups += o.nan_groups;
}

ErrorAccumulator::ErrorAccumulator(const ScaledFormat& f, double top_threshold)
    : f_(f), top_threshold_(top_threshold) {
  if (f.element->bits() <= 16) hist_.assign(std::size_t{1} << f.element->bits(), 0);
  if (f.element_table && !f.sub_block && !f.zero && f.code_element->bits() <= 16 &&
      f.code_element->bits() <= f.element->bits()) {
    kt_ = fused::make_kernel_table(*f.code_element);
    vec_ = kt_.ok && fused::have_avx512();
    if (!kt_.ok && fused::have_avx512()) {
      wkt_ = fused::make_wide_kernel_table(*f.code_element);
      vec_ = wide_ = wkt_.ok;
    }
  }
}

std::vector<std::uint64_t>& ErrorAccumulator::histogram() {
  if (vec_ && !hist_.empty()) {
    if (wide_) fused::flush_wide_histogram(whs_, wkt_, hist_.data());
    else fused::flush_histogram(hs_, kt_, hist_.data());
  }
  return hist_;
}

void ErrorAccumulator::add_unit(double ue, std::uint64_t un) {
  // One group: its squared-error sum and count, for the MSE and its interval.
  s_.n += un;
  s_.sum_err2 += ue;
  if (un) {
    ++s_.units;
    const double dn = static_cast<double>(un);
    s_.u_e += ue;
    s_.u_e2 += ue * ue;
    s_.u_n += dn;
    s_.u_n2 += dn * dn;
    s_.u_en += ue * dn;
  }
}

void ErrorAccumulator::count_group(const GroupScale& sc) {
  // Tensor and column groups arrive in several visits: the caller counts those.
  if (f_.granularity == Granularity::tensor || f_.granularity == Granularity::col) return;
  ++s_.groups;
  s_.saturated_groups += sc.saturated;
  s_.underflow_groups += sc.underflow;
  s_.nan_groups += sc.nan;
}

void ErrorAccumulator::add(const GroupView& g) {
  const GroupScale& sc = *g.scale;
  count_group(sc);
  double ue = 0;
  std::uint64_t un = 0;
  for (std::size_t i = 0; i < g.n; ++i) {
    const double x = g.x[i * g.stride];
    if (!std::isfinite(x)) {
      ++s_.nonfinite;
      continue;
    }
    const double q = g.values[i];
    if (std::isnan(q)) {
      ++s_.nan_outputs;
      continue;
    }
    const double err = q - x;
    const double e2 = err * err;
    ++un;
    ue += e2;
    s_.sum_x += x;
    s_.sum_x2 += x * x;
    const double ax = std::fabs(x), ae = std::fabs(err);
    s_.max_abs_err = std::max(s_.max_abs_err, ae);
    s_.max_abs_x = std::max(s_.max_abs_x, ax);
    if (x != 0) {
      ++s_.nonzero;
      s_.sum_rel += ae / ax;
      if (q == 0) ++s_.zeroed;
    }
    if (ax >= top_threshold_) {
      ++s_.top_n;
      s_.top_err2 += e2;
    }
    if (!hist_.empty()) ++hist_[g.codes[i]];
  }
  if (!sc.nan) s_.clipped += g.clipped;
  add_unit(ue, un);
}

void ErrorAccumulator::add_fused(const GroupView& g) {
  const GroupScale& sc = *g.scale;
  count_group(sc);
  if (sc.nan) {
    // As in add(): NaN/inf inputs counted, the group's finite inputs left out.
    for (std::size_t i = 0; i < g.n; ++i) {
      if (std::isfinite(g.x[i * g.stride])) ++s_.nan_outputs;
      else ++s_.nonfinite;
    }
    return;
  }
  const NearestTable& t = *f_.element_table;
  const double s = sc.scale, z = sc.zero;
  const bool affine = f_.zero != nullptr, zero_scale = !(s > 0);
  const double chi = g.quantizer->clip_high(), clo = g.quantizer->clip_low();
  // s a power of two 2^(sexp - 1) with -1000 < sexp < 1000 (as frexp would say): a
  // normal binary64 with a zero significand field and biased exponent sexp + 1022.
  const std::uint64_t sbits = std::bit_cast<std::uint64_t>(s);
  const std::uint64_t sfield = sbits >> 52;  // sign and biased exponent
  const bool pow2 = s > 0 && (sbits & ((std::uint64_t{1} << 52) - 1)) == 0 && sfield > 22 && sfield < 2022;
  // 1 / 2^k = 2^-k, normal for |k| < 1000: the biased exponent 2046 - field (what 1.0 / s gives).
  const double inv = pow2 ? std::bit_cast<double>((2046 - sfield) << 52) : 0.0;
  const Code zcode = affine ? sc.zero_code : (zero_scale ? t.encode(0.0) : 0);
  double ue = 0, sx = s_.sum_x, sx2 = s_.sum_x2, srel = s_.sum_rel, mae = s_.max_abs_err, max_x = s_.max_abs_x;
  double top_e2 = s_.top_err2;
  std::uint64_t nonzero = 0, zeroed = 0, top_n = 0, clip = 0;
  const double top = top_threshold_;
  std::uint64_t* hist = hist_.empty() ? nullptr : hist_.data();
  // Fixed-scale formats have no group to mark NaN: check each input.
  const bool check = f_.granularity == Granularity::fixed;
  std::uint64_t skipped = 0;
  // The kernels need y = x / s finite (|x| <= FLT_MAX): s > 1e-250 keeps |y| below 1e289.
  if (vec_ && g.stride == 1 && !affine && !zero_scale && !check && s > 1e-250) {
    // The vector kernel (fused_kernels.hpp): the same per-element terms, the
    // group's sums formed in lanes.
    fused::GroupSums r;
    if (wide_)
      fused::group_avx512_wide(wkt_, g.x, g.n, s, inv, pow2, chi, clo, top, r, lanes_, hist ? &whs_ : nullptr);
    else
      fused::group_avx512(kt_, g.x, g.n, s, inv, pow2, chi, clo, top, r, lanes_, hist ? &hs_ : nullptr);
    ue = r.err2;
  } else  // the scalar loop: the definition the kernels reproduce
  for (std::size_t i = 0; i < g.n; ++i) {
    const double x = g.x[i * g.stride];
    if (check && !std::isfinite(x)) {
      ++skipped;
      continue;
    }
    Code c;
    double q;
    if (zero_scale) {
      c = zcode;
      q = 0.0;
    } else if (affine) {
      const double y = x / s + z;
      clip += (y > chi) | (y < clo);
      c = t.encode(y);
      q = s * (t.decode(c) - z);
    } else {
      // x / s equals x * (1 / s) exactly when s is a power of two (both are the
      // correctly rounded value of the same quotient).
      const double y = pow2 ? x * inv : x / s;
      clip += (y > chi) | (y < clo);
      c = t.encode(y);
      q = s * t.decode(c);
    }
    const double err = q - x;
    const double e2 = err * err;
    ue += e2;
    sx += x;
    sx2 += x * x;
    const double ax = std::fabs(x), ae = std::fabs(err);
    mae = std::max(mae, ae);
    max_x = std::max(max_x, ax);
    if (x != 0) {
      ++nonzero;
      srel += ae / ax;
      zeroed += q == 0;
    }
    if (ax >= top) {
      ++top_n;
      top_e2 += e2;
    }
    if (hist) ++hist[c];
  }
  s_.sum_x = sx;
  s_.sum_x2 = sx2;
  s_.sum_rel = srel;
  s_.max_abs_err = mae;
  s_.max_abs_x = max_x;
  s_.top_err2 = top_e2;
  s_.nonzero += nonzero;
  s_.zeroed += zeroed;
  s_.top_n += top_n;
  s_.clipped += clip;
  s_.nonfinite += skipped;
  const std::uint64_t un = g.n - skipped;
  add_unit(ue, un);
}

void ErrorAccumulator::add_rows_fused(const TensorPlan& plan, std::uint64_t row0, std::uint64_t nrows,
                                      const float* data) {
  // As quantize_rows_impl's block loop along axis 1 (raw mode): summarize, choose, fused loop.
  // One quantizer per accumulator and tensor scale (building one per chunk costs a value
  // table and, for rule mx, the scale codes).
  if (!rows_q_ || rows_q_->tensor_scale() != plan.tensor_scale)
    rows_q_ = std::make_shared<const GroupQuantizer>(f_, plan.tensor_scale);
  const GroupQuantizer& q = *rows_q_;
  const std::uint64_t cols = plan.cols, k = static_cast<std::uint64_t>(f_.block);
  for (std::uint64_t r = 0; r < nrows; ++r) {
    for (std::uint64_t j = 0; j < plan.blocks_along; ++j) {
      const std::uint64_t start = j * k, len = std::min(k, cols - start);
      const float* x = data + r * cols + start;
      const std::size_t n = static_cast<std::size_t>(len);
      // The rules here (mx, absmax, noclip; no zero point) read only amax and the
      // nonfinite count of the summary: the kernel computes amax alone; a group with
      // a NaN or infinity takes the full summary.
      GroupSummary s;
      if (!fused::amax_avx512(x, n, s.amax)) s = summarize(x, n, 1);
      const GroupScale g = q.choose(s, x, n, 1);
      add_fused(GroupView{(row0 + r) * plan.blocks_along + j, x, n, 1, nullptr, nullptr, &g, 0, &q});
    }
  }
}

ErrorReport make_report(const ErrorSums& s, const std::vector<std::uint64_t>& hist) {
  ErrorReport r;
  r.n = s.n;
  r.groups = s.groups;
  r.saturated_groups = s.saturated_groups;
  r.underflow_groups = s.underflow_groups;
  r.nan_groups = s.nan_groups;
  r.nonfinite = s.nonfinite;
  if (s.n == 0) return r;
  const double n = static_cast<double>(s.n);
  r.mse = s.sum_err2 / n;
  const double mean = s.sum_x / n;
  const double var = s.sum_x2 / n - mean * mean;
  r.mse_normalised = var > 0 ? r.mse / var : 0;
  r.lossless = s.sum_err2 == 0;
  const double power = s.sum_x2 / n;
  if (!r.lossless && power > 0) r.sqnr_db = 10 * std::log10(power / r.mse);
  // Ratio estimator over groups: var(e_b - mse * n_b) / (B * nbar^2).
  if (s.units > 1) {
    const double B = static_cast<double>(s.units);
    const double ss = s.u_e2 - 2 * r.mse * s.u_en + r.mse * r.mse * s.u_n2;
    const double var_u = std::max(ss, 0.0) / (B - 1);
    const double nbar = s.u_n / B;
    r.mse_stderr = std::sqrt(var_u / B) / nbar;
    if (!r.lossless && power > 0) {
      const double hi = r.mse + 1.96 * r.mse_stderr, lo = r.mse - 1.96 * r.mse_stderr;
      r.sqnr_low = 10 * std::log10(power / hi);
      if (lo > 0) r.sqnr_high = 10 * std::log10(power / lo);
    }
  }
  r.max_abs_err = s.max_abs_err;
  r.max_err_rel_absmax = s.max_abs_x > 0 ? s.max_abs_err / s.max_abs_x : 0;
  r.mean_rel_err = s.nonzero ? s.sum_rel / static_cast<double>(s.nonzero) : 0;
  r.clip_rate = static_cast<double>(s.clipped) / n;
  r.zero_rate = s.nonzero ? static_cast<double>(s.zeroed) / static_cast<double>(s.nonzero) : 0;
  r.top_n = s.top_n;
  r.top_mse = s.top_n ? s.top_err2 / static_cast<double>(s.top_n) : 0;
  std::uint64_t total = 0;
  for (auto c : hist) total += c;
  for (auto c : hist) {
    if (!c) continue;
    ++r.codes_used;
    const double p = static_cast<double>(c) / static_cast<double>(total);
    r.entropy_bits -= p * std::log2(p);
  }
  return r;
}

}  // namespace lobit
