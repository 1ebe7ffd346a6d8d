// AVX-512 kernels of the fused scoring loop; the exactness argument is in the header.
#include "lobit/measure/fused_kernels.hpp"

#include <algorithm>
#include <bit>
#include <cmath>
#include <cstdlib>
// GCC 12 warns about the _mm512_undefined_* placeholders inside its own intrinsics headers.
#pragma GCC diagnostic ignored "-Wuninitialized"
#pragma GCC diagnostic ignored "-Wmaybe-uninitialized"
#include <immintrin.h>
#include <limits>

#include "lobit/format/value_table.hpp"

namespace lobit::fused {

namespace {
// Both table layouts from the value table: thr' (see the header), values, codes, the
// index of zero and the code of -0; `ok` only where every threshold is a double.
template <class Table>
Table fill_table(const ElementFormat& e, std::size_t max_values) {
  Table k;
  for (double& v : k.thr) v = INFINITY;
  for (double& v : k.val) v = 0;
  if (e.bits() > 16) return k;
  const ValueTable t(e);
  const auto& th = t.thresholds();
  if (t.values().size() > max_values || th.empty()) return k;
  for (std::size_t j = 0; j < th.size(); ++j) {
    if (!th[j].exact_in_double()) return k;
    k.thr[j] = th[j].tie_to_upper ? std::nextafter(th[j].nearest, -INFINITY) : th[j].nearest;
  }
  for (std::size_t i = 0; i < t.values().size(); ++i) {
    k.code[i] = t.codes()[i];
    k.val[i] = e.decode(t.codes()[i]);
    if (t.values()[i] == 0) k.zero_index = static_cast<int>(i);
  }
  if (e.has_negative_zero() && k.zero_index >= 0) k.has_neg_zero = true, k.neg_zero_code = e.encode(-0.0);
  k.ok = true;
  return k;
}
}  // namespace

KernelTable make_kernel_table(const ElementFormat& e) { return fill_table<KernelTable>(e, 16); }

WideKernelTable make_wide_kernel_table(const ElementFormat& e) { return fill_table<WideKernelTable>(e, 256); }

void flush_wide_histogram(WideHist& h, const WideKernelTable& t, std::uint64_t* hist) {
  for (std::size_t j = 0; j < h.idx.size(); ++j)
    if (h.idx[j]) hist[t.code[j % 256]] += h.idx[j], h.idx[j] = 0;
  if (h.neg_zero) {
    hist[t.code[static_cast<std::size_t>(t.zero_index)]] -= h.neg_zero;
    hist[t.neg_zero_code] += h.neg_zero;
    h.neg_zero = 0;
  }
}

bool have_avx512() {
  static const bool ok = [] {
    // LOBIT_DISABLE_AVX512 (any value): the scalar loops everywhere, to test them on any CPU.
    if (std::getenv("LOBIT_DISABLE_AVX512")) return false;
    __builtin_cpu_init();
    return __builtin_cpu_supports("avx512f") && __builtin_cpu_supports("avx512dq") &&
           __builtin_cpu_supports("avx512vl") && __builtin_cpu_supports("avx512bw");
  }();
  return ok;
}

#define LOBIT_AVX512 __attribute__((target("avx512f,avx512dq,avx512vl,avx512bw")))

namespace {

LOBIT_AVX512 inline double sum8(__m512d v) {
  // A fixed tree: ((l0 + l4) + (l2 + l6)) + ((l1 + l5) + (l3 + l7)).
  const __m256d a = _mm256_add_pd(_mm512_castpd512_pd256(v), _mm512_extractf64x4_pd(v, 1));
  const __m128d b = _mm_add_pd(_mm256_castpd256_pd128(a), _mm256_extractf128_pd(a, 1));
  return _mm_cvtsd_f64(_mm_add_sd(b, _mm_unpackhi_pd(b, b)));
}

// 1 where t < y, else 0 (t, y not NaN, y finite; see the index search).
LOBIT_AVX512 inline __m512i below(__m512d t, __m512d y) {
  return _mm512_srli_epi64(_mm512_castpd_si512(_mm512_sub_pd(t, y)), 63);
}

// Byte counters: lane l of lo counts index b (0..7) in its byte b, hi index 8 + b.
LOBIT_AVX512 void widen(HistState& h, __m512i lo, __m512i hi) {
  const __m512i f = _mm512_set1_epi64(0xff);
  for (int b = 0; b < 8; ++b) {
    const __m512i sh = _mm512_set1_epi64(8 * b);
    const __m512i cl = _mm512_and_si512(_mm512_srlv_epi64(lo, sh), f);
    const __m512i ch = _mm512_and_si512(_mm512_srlv_epi64(hi, sh), f);
    _mm512_store_si512(h.wide[b], _mm512_add_epi64(_mm512_load_si512(h.wide[b]), cl));
    _mm512_store_si512(h.wide[8 + b], _mm512_add_epi64(_mm512_load_si512(h.wide[8 + b]), ch));
  }
}

// Table: KernelTable (up to 16 values, in registers) or WideKernelTable (up to 256,
// gathered); Histogram: HistState or WideHist to match.
template <bool Pow2, bool Hist, class Table, class Histogram>
LOBIT_AVX512 void group_kernel(const Table& t, const float* x, std::size_t n, double s, double inv,
                               double chi, double clo, double top, GroupSums& out, LaneSums& lanes,
                               Histogram* hist) {
  constexpr bool wide = std::is_same_v<Table, WideKernelTable>;
  const double* thr = std::data(t.thr);
  const double* val = std::data(t.val);
  __m512d thr_lo{}, thr_hi{}, val_lo{}, val_hi{}, t3{}, t7{}, t11{};
  if constexpr (!wide) {
    thr_lo = _mm512_load_pd(thr), thr_hi = _mm512_load_pd(thr + 8);
    val_lo = _mm512_load_pd(val), val_hi = _mm512_load_pd(val + 8);
    t3 = _mm512_set1_pd(thr[3]), t7 = _mm512_set1_pd(thr[7]), t11 = _mm512_set1_pd(thr[11]);
  }
  const __m512d vs = _mm512_set1_pd(s), vinv = _mm512_set1_pd(inv), vchi = _mm512_set1_pd(chi),
                vclo = _mm512_set1_pd(clo), vtop = _mm512_set1_pd(top), zero = _mm512_setzero_pd();
  const __m512i i2 = _mm512_set1_epi64(2), i1 = _mm512_set1_epi64(1), izero = _mm512_set1_epi64(t.zero_index);
  __m512d ue = zero, sx = _mm512_load_pd(lanes.sum_x), sx2 = _mm512_load_pd(lanes.sum_x2),
          srel = _mm512_load_pd(lanes.sum_rel), te2 = _mm512_load_pd(lanes.top_err2),
          mae = _mm512_load_pd(lanes.max_abs_err), mx = _mm512_load_pd(lanes.max_abs_x);
  __m512i nonzero = _mm512_load_si512(lanes.nonzero), zeroed = _mm512_load_si512(lanes.zeroed),
          top_n = _mm512_load_si512(lanes.top_n), clip = _mm512_load_si512(lanes.clipped),
          negz = _mm512_setzero_si512();
  __m512i hlo = _mm512_setzero_si512(), hhi = _mm512_setzero_si512();
  const __m512i i64 = _mm512_set1_epi64(64);
  const bool negzero = t.has_neg_zero;
  int pending = 0;
  if constexpr (Hist && !wide) {
    hlo = _mm512_load_si512(hist->lo), hhi = _mm512_load_si512(hist->hi), pending = hist->pending;
    negz = _mm512_load_si512(hist->neg_zero);
  }
  alignas(64) std::int64_t lane_idx[8];
  // Wide tables: the eight gathers of a search depend on each other, so the searches
  // of four vectors run side by side (a tile of 32 inputs) to overlap their latency.
  __m512i tile_idx[4];
  __m512d tile_y[4];
  for (std::size_t i = 0; i < n; i += 8) {
    const std::size_t rem = n - i;
    const __mmask8 valid = rem >= 8 ? static_cast<__mmask8>(0xFF) : static_cast<__mmask8>((1u << rem) - 1);
    const __m512d xv = _mm512_cvtps_pd(_mm256_maskz_loadu_ps(valid, x + i));
    __m512d y;
    if constexpr (wide) {
      const std::size_t slot = (i / 8) % 4;
      if (slot == 0) {
        for (int k = 0; k < 4; ++k) {
          const std::size_t at = i + 8 * static_cast<std::size_t>(k);
          const std::size_t left = at < n ? n - at : 0;
          const __mmask8 m = left >= 8 ? static_cast<__mmask8>(0xFF) : static_cast<__mmask8>((1u << left) - 1);
          const __m512d xk = _mm512_cvtps_pd(_mm256_maskz_loadu_ps(m, x + (at < n ? at : 0)));
          tile_y[k] = Pow2 ? _mm512_mul_pd(xk, vinv) : _mm512_div_pd(xk, vs);
          tile_idx[k] = _mm512_setzero_si512();
        }
        for (int lg = 7; lg >= 0; --lg) {
          const __m512i step = _mm512_set1_epi64((std::int64_t{1} << lg) - 1);
          for (int k = 0; k < 4; ++k) {
            const __m512i probe = _mm512_add_epi64(tile_idx[k], step);
            tile_idx[k] = _mm512_add_epi64(
                tile_idx[k], _mm512_slli_epi64(below(_mm512_i64gather_pd(probe, thr, 8), tile_y[k]), lg));
          }
        }
      }
      y = tile_y[slot];
    } else {
      y = Pow2 ? _mm512_mul_pd(xv, vinv) : _mm512_div_pd(xv, vs);
    }
    // Index: entries of thr' below y. Comparisons are counted by the sign of a
    // difference (measured faster here than mask compares): for finite y and
    // finite or +inf t, fl(t - y) < 0 exactly when t < y (rounding keeps the sign,
    // gradual underflow keeps t - y nonzero for t != y, and t - y = +0 for t == y).
    // First the block of four, k = #{thr'_3, thr'_7, thr'_11 below y}, then the
    // entries 4k, 4k + 1, 4k + 2 of that block (any count of a sorted table will do).
    __m512i idx;
    __m512d v;
    if constexpr (wide) {
      // Binary search over the 256 padded entries (done for the tile above): after the
      // steps 128, 64, ..., 1 the index is the number of entries of thr' below y (entry
      // 255 is never probed). Lanes past n hold y = 0 and are masked out below.
      idx = tile_idx[(i / 8) % 4];
      v = _mm512_i64gather_pd(idx, val, 8);
    } else {
      const __m512i k3 = _mm512_add_epi64(_mm512_add_epi64(below(t3, y), below(t7, y)), below(t11, y));
      const __m512i blk = _mm512_slli_epi64(k3, 2);
      idx = _mm512_add_epi64(blk, below(_mm512_permutex2var_pd(thr_lo, blk, thr_hi), y));
      idx = _mm512_add_epi64(
          idx, _mm512_add_epi64(below(_mm512_permutex2var_pd(thr_lo, _mm512_add_epi64(blk, i1), thr_hi), y),
                                below(_mm512_permutex2var_pd(thr_lo, _mm512_add_epi64(blk, i2), thr_hi), y)));
      v = _mm512_permutex2var_pd(val_lo, idx, val_hi);
    }
    const __m512d q = _mm512_mul_pd(vs, v);
    const __m512d err = _mm512_sub_pd(q, xv);
    const __m512d e2 = _mm512_mul_pd(err, err);
    ue = _mm512_mask_add_pd(ue, valid, ue, e2);
    sx = _mm512_mask_add_pd(sx, valid, sx, xv);
    sx2 = _mm512_mask_add_pd(sx2, valid, sx2, _mm512_mul_pd(xv, xv));
    const __m512d ax = _mm512_abs_pd(xv), ae = _mm512_abs_pd(err);
    mae = _mm512_mask_max_pd(mae, valid, mae, ae);
    mx = _mm512_mask_max_pd(mx, valid, mx, ax);
    const __mmask8 nz = _mm512_mask_cmp_pd_mask(valid, xv, zero, _CMP_NEQ_OQ);
    srel = _mm512_mask_add_pd(srel, nz, srel, _mm512_maskz_div_pd(nz, ae, ax));
    nonzero = _mm512_mask_add_epi64(nonzero, nz, nonzero, i1);
    const __mmask8 zq = _mm512_mask_cmp_pd_mask(nz, q, zero, _CMP_EQ_OQ);
    zeroed = _mm512_mask_add_epi64(zeroed, zq, zeroed, i1);
    const __mmask8 tm = _mm512_mask_cmp_pd_mask(valid, ax, vtop, _CMP_GE_OQ);
    top_n = _mm512_mask_add_epi64(top_n, tm, top_n, i1);
    te2 = _mm512_mask_add_pd(te2, tm, te2, e2);
    // Clipped: y > chi or y < clo (chi > clo: at most one of the two).
    clip = _mm512_mask_add_epi64(clip, valid, clip, _mm512_add_epi64(below(vchi, y), below(y, vclo)));
    if constexpr (Hist && wide) {
      _mm512_store_si512(lane_idx, idx);
      for (int l = 0; l < 8; ++l)
        if ((valid >> l) & 1) ++hist->idx[256 * static_cast<std::size_t>(l) + static_cast<std::size_t>(lane_idx[l])];
      if (negzero) {
        const __mmask8 neg = valid & _mm512_movepi64_mask(_mm512_castpd_si512(y));
        hist->neg_zero += static_cast<std::uint64_t>(__builtin_popcount(_mm512_mask_cmpeq_epi64_mask(neg, idx, izero)));
      }
    }
    if constexpr (Hist && !wide) {
      if (negzero) {  // y with the sign bit at the index of zero: the code of -0
        const __mmask8 neg = valid & _mm512_movepi64_mask(_mm512_castpd_si512(y));
        negz = _mm512_mask_add_epi64(negz, _mm512_mask_cmpeq_epi64_mask(neg, idx, izero), negz, i1);
      }
      // One in byte idx of lo (idx < 8) or byte idx - 8 of hi (vpsllvq gives 0 for
      // counts of 64 and up, negative ones included as unsigned).
      const __m512i bit = _mm512_slli_epi64(idx, 3);
      hlo = _mm512_mask_add_epi64(hlo, valid, hlo, _mm512_sllv_epi64(i1, bit));
      hhi = _mm512_mask_add_epi64(hhi, valid, hhi, _mm512_sllv_epi64(i1, _mm512_sub_epi64(bit, i64)));
      if (++pending == 255) {  // a byte counter holds 255
        widen(*hist, hlo, hhi);
        hlo = hhi = _mm512_setzero_si512();
        pending = 0;
      }
    }
  }
  if constexpr (Hist && !wide) {
    _mm512_store_si512(hist->lo, hlo);
    _mm512_store_si512(hist->hi, hhi);
    _mm512_store_si512(hist->neg_zero, negz);
    hist->pending = pending;
  }
  out.err2 = sum8(ue);
  _mm512_store_pd(lanes.sum_x, sx);
  _mm512_store_pd(lanes.sum_x2, sx2);
  _mm512_store_pd(lanes.sum_rel, srel);
  _mm512_store_pd(lanes.top_err2, te2);
  _mm512_store_pd(lanes.max_abs_err, mae);
  _mm512_store_pd(lanes.max_abs_x, mx);
  lanes.pending = true;
  _mm512_store_si512(lanes.nonzero, nonzero);
  _mm512_store_si512(lanes.zeroed, zeroed);
  _mm512_store_si512(lanes.top_n, top_n);
  _mm512_store_si512(lanes.clipped, clip);
}

LOBIT_AVX512 void flush_avx512(HistState& h) {
  widen(h, _mm512_load_si512(h.lo), _mm512_load_si512(h.hi));
  _mm512_store_si512(h.lo, _mm512_setzero_si512());
  _mm512_store_si512(h.hi, _mm512_setzero_si512());
  h.pending = 0;
}

}  // namespace

template <class Table, class Histogram>
void dispatch(const Table& t, const float* x, std::size_t n, double s, double inv, bool pow2, double chi, double clo,
              double top, GroupSums& out, LaneSums& lanes, Histogram* hist) {
  if (pow2) {
    if (hist) group_kernel<true, true>(t, x, n, s, inv, chi, clo, top, out, lanes, hist);
    else group_kernel<true, false>(t, x, n, s, inv, chi, clo, top, out, lanes, hist);
  } else {
    if (hist) group_kernel<false, true>(t, x, n, s, inv, chi, clo, top, out, lanes, hist);
    else group_kernel<false, false>(t, x, n, s, inv, chi, clo, top, out, lanes, hist);
  }
}

void group_avx512(const KernelTable& t, const float* x, std::size_t n, double s, double inv, bool pow2, double chi,
                  double clo, double top, GroupSums& out, LaneSums& lanes, HistState* hist) {
  dispatch(t, x, n, s, inv, pow2, chi, clo, top, out, lanes, hist);
}

void group_avx512_wide(const WideKernelTable& t, const float* x, std::size_t n, double s, double inv, bool pow2,
                       double chi, double clo, double top, GroupSums& out, LaneSums& lanes, WideHist* hist) {
  dispatch(t, x, n, s, inv, pow2, chi, clo, top, out, lanes, hist);
}

namespace {
double lane_sum(double* l) {
  const double r = ((l[0] + l[4]) + (l[2] + l[6])) + ((l[1] + l[5]) + (l[3] + l[7]));
  for (int i = 0; i < 8; ++i) l[i] = 0;
  return r;
}
double lane_max(double* l) {
  double r = l[0];
  for (int i = 1; i < 8; ++i) r = std::max(r, l[i]);
  for (int i = 0; i < 8; ++i) l[i] = 0;
  return r;
}
}  // namespace

static std::uint64_t lane_count(std::uint64_t* l) {
  std::uint64_t r = 0;
  for (int i = 0; i < 8; ++i) r += l[i], l[i] = 0;
  return r;
}

void flush_lanes(LaneSums& l, double& sum_x, double& sum_x2, double& sum_rel, double& top_err2, double& max_abs_err,
                 double& max_abs_x, std::uint64_t& nonzero, std::uint64_t& zeroed, std::uint64_t& top_n,
                 std::uint64_t& clipped) {
  if (!l.pending) return;
  sum_x += lane_sum(l.sum_x);
  sum_x2 += lane_sum(l.sum_x2);
  sum_rel += lane_sum(l.sum_rel);
  top_err2 += lane_sum(l.top_err2);
  max_abs_err = std::max(max_abs_err, lane_max(l.max_abs_err));
  max_abs_x = std::max(max_abs_x, lane_max(l.max_abs_x));
  nonzero += lane_count(l.nonzero);
  zeroed += lane_count(l.zeroed);
  top_n += lane_count(l.top_n);
  clipped += lane_count(l.clipped);
  l.pending = false;
}

void flush_histogram(HistState& h, const KernelTable& t, std::uint64_t* hist) {
  if (have_avx512()) flush_avx512(h);
  for (int j = 0; j < 16; ++j) {
    std::uint64_t c = 0;
    for (int l = 0; l < 8; ++l) c += h.wide[j][l], h.wide[j][l] = 0;
    if (c) hist[t.code[j]] += c;
  }
  std::uint64_t nz = 0;
  for (int l = 0; l < 8; ++l) nz += h.neg_zero[l], h.neg_zero[l] = 0;
  if (nz) {
    hist[t.code[t.zero_index]] -= nz;
    hist[t.neg_zero_code] += nz;
  }
}

namespace {
LOBIT_AVX512 bool summarize_kernel(const float* x, std::size_t n, double& amax, double& min, double& max) {
  if (n == 0) return false;
  const __m512 first = _mm512_set1_ps(x[0]);
  __m512 mn = first, mxv = first;
  const __m512i expo = _mm512_set1_epi32(0x7f800000);
  __mmask16 bad = 0;
  for (std::size_t i = 0; i < n; i += 16) {
    const std::size_t rem = n - i;
    const __mmask16 valid = rem >= 16 ? static_cast<__mmask16>(0xFFFF) : static_cast<__mmask16>((1u << rem) - 1);
    const __m512 v = _mm512_mask_loadu_ps(first, valid, x + i);  // lanes past n repeat x[0]
    bad |= _mm512_cmpeq_epi32_mask(_mm512_and_si512(_mm512_castps_si512(v), expo), expo);
    mn = _mm512_min_ps(mn, v);
    mxv = _mm512_max_ps(mxv, v);
  }
  if (bad) return false;
  // -min and max reduced together: [-min lanes | max lanes], folded within each half.
  const __m256 lo = _mm256_min_ps(_mm512_castps512_ps256(mn), _mm512_extractf32x8_ps(mn, 1));
  const __m256 hi = _mm256_max_ps(_mm512_castps512_ps256(mxv), _mm512_extractf32x8_ps(mxv, 1));
  __m512 a = _mm512_insertf32x8(_mm512_castps256_ps512(_mm256_sub_ps(_mm256_setzero_ps(), lo)), hi, 1);
  a = _mm512_max_ps(a, _mm512_shuffle_f32x4(a, a, _MM_SHUFFLE(2, 3, 0, 1)));
  a = _mm512_max_ps(a, _mm512_permute_ps(a, _MM_SHUFFLE(1, 0, 3, 2)));
  a = _mm512_max_ps(a, _mm512_permute_ps(a, _MM_SHUFFLE(2, 3, 0, 1)));
  alignas(64) float r[16];
  _mm512_store_ps(r, a);
  const double neg_min = r[0], mx = r[8];
  if (neg_min == 0 || mx == 0) return false;  // which zero the scalar loop keeps depends on the order
  min = -neg_min;
  max = mx;
  amax = std::max(neg_min, mx) ;  // max |x| = max(-min, max), exact
  return true;
}
}  // namespace

namespace {
LOBIT_AVX512 bool amax_kernel(const float* x, std::size_t n, double& amax) {
  const __m512i expo = _mm512_set1_epi32(0x7f800000);
  __m512 am = _mm512_setzero_ps();
  __mmask16 bad = 0;
  for (std::size_t i = 0; i < n; i += 16) {
    const std::size_t rem = n - i;
    const __mmask16 valid = rem >= 16 ? static_cast<__mmask16>(0xFFFF) : static_cast<__mmask16>((1u << rem) - 1);
    const __m512 v = _mm512_maskz_loadu_ps(valid, x + i);  // lanes past n: +0, which changes no maximum
    bad |= _mm512_cmpeq_epi32_mask(_mm512_and_si512(_mm512_castps_si512(v), expo), expo);
    am = _mm512_max_ps(am, _mm512_abs_ps(v));
  }
  if (bad) return false;
  __m256 a = _mm256_max_ps(_mm512_castps512_ps256(am), _mm512_extractf32x8_ps(am, 1));
  __m128 b = _mm_max_ps(_mm256_castps256_ps128(a), _mm256_extractf128_ps(a, 1));
  b = _mm_max_ps(b, _mm_movehl_ps(b, b));
  b = _mm_max_ss(b, _mm_movehdup_ps(b));
  amax = _mm_cvtss_f32(b);
  return true;
}
}  // namespace

namespace {
LOBIT_AVX512 void high_bins_kernel(const float* x, std::size_t n, std::uint32_t lo, std::uint64_t* bins) {
  const __m512i mag = _mm512_set1_epi32(0x7fffffff), vlo = _mm512_set1_epi32(static_cast<int>(lo));
  std::size_t i = 0;
  for (; i + 16 <= n; i += 16) {
    const __m512i a = _mm512_and_si512(_mm512_loadu_si512(x + i), mag);
    __mmask16 m = _mm512_cmpge_epu32_mask(a, vlo);
    while (m) {  // rare: the inputs at or above the floor
      const int k = __builtin_ctz(m);
      m = static_cast<__mmask16>(m & (m - 1));
      ++bins[(std::bit_cast<std::uint32_t>(x[i + static_cast<std::size_t>(k)]) & 0x7fffffffu) >> 16];
    }
  }
  for (; i < n; ++i) {
    const std::uint32_t a = std::bit_cast<std::uint32_t>(x[i]) & 0x7fffffffu;
    if (a >= lo) ++bins[a >> 16];
  }
}
}  // namespace

bool high_bins_avx512(const float* x, std::size_t n, std::uint32_t lo, std::uint64_t* bins) {
  if (!have_avx512()) return false;
  high_bins_kernel(x, n, lo, bins);
  return true;
}

bool amax_avx512(const float* x, std::size_t n, double& amax) { return have_avx512() && amax_kernel(x, n, amax); }

bool summarize_avx512(const float* x, std::size_t n, double& amax, double& min, double& max) {
  return have_avx512() && summarize_kernel(x, n, amax, min, max);
}

}  // namespace lobit::fused
