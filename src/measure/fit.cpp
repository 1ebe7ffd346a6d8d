// `lobit fit` statistics: the streaming passes over a source, the exact median and
// Laplace scale from bucket histograms, the subsample, and totals over several sources.
#include "lobit/measure/fit.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <bit>
#include <cmath>
#include <limits>

#include "fit_parallel.hpp"
#include "lobit/error.hpp"
#include "lobit/source/random.hpp"

namespace lobit {

namespace {

using fit_detail::CompensatedSum;
using fit_detail::WavePool;

constexpr std::size_t kBuckets = std::size_t{1} << 16;

// The order-preserving key of a float32: unsigned order of keys is the order of the
// values (-0 just below +0). Bucket = top 16 bits (sign, exponent, 7 fraction bits).
inline std::uint32_t order_key(float x) {
  const std::uint32_t u = std::bit_cast<std::uint32_t>(x);
  return (u & 0x80000000u) ? ~u : (u | 0x80000000u);
}
inline float key_value(std::uint32_t key) {
  const std::uint32_t u = (key & 0x80000000u) ? (key ^ 0x80000000u) : ~key;
  return std::bit_cast<float>(u);
}
// Within a bucket b, value(b, k) = value(b, 0) + k * ulp(b) for k = 0 .. 0xFFFF: the
// exponent is fixed, so the fraction (and for negative values its complement) is linear.
inline double bucket_value(std::uint32_t b, std::uint32_t k) { return key_value((b << 16) | k); }
inline double bucket_ulp(std::uint32_t b) { return bucket_value(b, 1) - bucket_value(b, 0); }

// Central moment sums of finite values, merged with the pairwise update (Chan, Golub and
// LeVeque 1979 for m2; Pebay 2008 for m3 and m4).
struct Moments {
  double n = 0, mean = 0, m2 = 0, m3 = 0, m4 = 0;
  void merge(const Moments& b) {
    if (b.n == 0) return;
    if (n == 0) {
      *this = b;
      return;
    }
    const double na = n, nb = b.n, nn = na + nb, d = b.mean - mean, d2 = d * d;
    const double m2n = m2 + b.m2 + d2 * na * nb / nn;
    const double m3n = m3 + b.m3 + d2 * d * na * nb * (na - nb) / (nn * nn) + 3 * d * (na * b.m2 - nb * m2) / nn;
    const double m4n = m4 + b.m4 + d2 * d2 * na * nb * (na * na - na * nb + nb * nb) / (nn * nn * nn) +
                       6 * d2 * (na * na * b.m2 + nb * nb * m2) / (nn * nn) + 4 * d * (na * b.m3 - nb * m3) / nn;
    mean += d * nb / nn;
    m2 = m2n, m3 = m3n, m4 = m4n, n = nn;
  }
};

// Two passes over the finite values of one chunk. Equal values give their value as the
// mean and exact zeros for the central sums, so a constant tensor has std 0, not rounding.
Moments chunk_moments(const float* x, std::size_t len) {
  Moments m;
  double sum = 0;
  std::uint64_t n = 0;
  float first = 0;
  bool same = true;
  for (std::size_t i = 0; i < len; ++i)
    if (std::isfinite(x[i])) {
      if (n == 0) first = x[i];
      same = same && x[i] == first;
      sum += x[i], ++n;
    }
  if (n == 0) return m;
  m.n = static_cast<double>(n);
  if (same) {
    m.mean = first;
    return m;
  }
  const double mean = sum / m.n;
  double s1 = 0, s2 = 0, s3 = 0, s4 = 0;
  for (std::size_t i = 0; i < len; ++i) {
    if (!std::isfinite(x[i])) continue;
    const double d = x[i] - mean, d2 = d * d;
    s1 += d, s2 += d2, s3 += d2 * d, s4 += d2 * d2;
  }
  m.mean = mean + s1 / m.n;
  m.m2 = std::max(0.0, s2 - s1 * s1 / m.n);  // the corrected two-pass form
  m.m3 = s3;
  m.m4 = s4;
  return m;
}

struct ChannelAcc {
  std::uint64_t n = 0;
  double mean = 0, m2 = 0;
  float absmax = 0;
  void merge(const ChannelAcc& b) {
    absmax = std::max(absmax, b.absmax);
    if (b.n == 0) return;
    if (n == 0) {
      n = b.n, mean = b.mean, m2 = b.m2;
      return;
    }
    const double na = static_cast<double>(n), nb = static_cast<double>(b.n), nn = na + nb, d = b.mean - mean;
    m2 += b.m2 + d * d * na * nb / nn;
    mean += d * nb / nn;
    n += b.n;
  }
};

struct Extreme {
  float value;
  std::uint32_t source;
  std::uint64_t index;
};

// The `keep` largest (or smallest) values, ties by (source, index): a deterministic set
// whatever order the values are offered in.
class ExtremeSet {
 public:
  ExtremeSet(int keep = 0, bool high = true) : keep_(static_cast<std::size_t>(std::max(keep, 0))), high_(high) {}
  bool better(const Extreme& a, const Extreme& b) const {
    if (a.value != b.value) return high_ ? a.value > b.value : a.value < b.value;
    if (a.source != b.source) return a.source < b.source;
    return a.index < b.index;
  }
  void offer(float x, std::uint32_t source, std::uint64_t index) {
    if (keep_ == 0) return;
    if (full_ && (high_ ? x < bound_ : x > bound_)) return;
    v_.push_back({x, source, index});
    if (v_.size() >= 2 * keep_ + 64) prune();
  }
  void absorb(const ExtremeSet& o, std::uint32_t source_offset) {
    for (Extreme e : o.v_) {
      e.source += source_offset;
      v_.push_back(e);
    }
    prune();
  }
  void prune() {
    if (v_.size() > keep_) {
      std::nth_element(v_.begin(), v_.begin() + static_cast<std::ptrdiff_t>(keep_ - 1), v_.end(),
                       [this](const Extreme& a, const Extreme& b) { return better(a, b); });
      v_.resize(keep_);
    }
    if (v_.size() == keep_ && keep_ > 0) {
      full_ = true;
      bound_ = v_[0].value;
      for (const auto& e : v_) bound_ = high_ ? std::min(bound_, e.value) : std::max(bound_, e.value);
    }
  }
  const std::vector<Extreme>& values() const { return v_; }

 private:
  std::size_t keep_;
  bool high_;
  bool full_ = false;
  float bound_ = 0;
  std::vector<Extreme> v_;
};

struct SampleEntry {
  std::uint64_t key;
  float value;
  std::uint32_t source;
};
inline bool key_less(const SampleEntry& a, const SampleEntry& b) {
  return a.key != b.key ? a.key < b.key : a.source < b.source;
}

// Bottom-k sampling: the `keep` entries with the smallest keys. Union and pruning in any
// order give the same set, so samples merge across threads, chunks and sources.
class SampleSet {
 public:
  explicit SampleSet(std::uint64_t keep = 0) : keep_(keep) {}
  void add(const SampleEntry& e) {
    v_.push_back(e);
    if (v_.size() >= 2 * keep_ + 1024) prune();
  }
  void absorb(const SampleSet& o, std::uint32_t source_offset) {
    for (SampleEntry e : o.v_) {
      e.source += source_offset;
      add(e);
    }
    prune();
  }
  void prune() {
    if (v_.size() > keep_) {
      std::nth_element(v_.begin(), v_.begin() + static_cast<std::ptrdiff_t>(keep_), v_.end(), key_less);
      v_.resize(keep_);
    }
  }
  std::size_t size() const { return v_.size(); }
  // The values, sorted (as binary64, exactly).
  std::vector<double> sorted_values() {
    prune();
    std::vector<double> out;
    out.reserve(v_.size());
    for (const auto& e : v_) out.push_back(e.value);
    std::sort(out.begin(), out.end());
    return out;
  }
  void clear() {
    v_.clear();
    v_.shrink_to_fit();
  }

 private:
  std::uint64_t keep_;
  std::vector<SampleEntry> v_;
};

// Chunks of whole source rows; chunk k holds rows [k * rows_per, ...).
struct ChunkPlan {
  std::uint64_t rows = 0, cols = 0, rows_per = 1, chunks = 0;
  ChunkPlan(const TensorSource& src, std::uint64_t chunk_elements) : rows(src.rows()), cols(src.cols()) {
    if (rows == 0 || cols == 0) return;
    rows_per = std::max<std::uint64_t>(1, chunk_elements / cols);
    chunks = (rows + rows_per - 1) / rows_per;
  }
};

struct ChunkData {
  const float* x;
  std::size_t len;
  std::uint64_t f0;  // flat index of x[0]
};

// Runs work(slot, chunk) over every chunk, `threads` chunks at a time ("waves"); after each
// wave, after_wave(n) sees slots 0 .. n-1 holding chunks in increasing order, so results
// merged there are merged in chunk order.
template <class Work, class AfterWave>
void for_each_chunk(const TensorSource& src, const ChunkPlan& plan, WavePool& pool,
                    std::vector<std::vector<float>>& buffers, Work&& work, AfterWave&& after_wave) {
  const int T = pool.threads();
  for (std::uint64_t first = 0; first < plan.chunks; first += static_cast<std::uint64_t>(T)) {
    const int n = static_cast<int>(std::min<std::uint64_t>(static_cast<std::uint64_t>(T), plan.chunks - first));
    pool.run(n, [&](int t) {
      const std::uint64_t k = first + static_cast<std::uint64_t>(t);
      const std::uint64_t row0 = k * plan.rows_per, nrows = std::min(plan.rows_per, plan.rows - row0);
      const std::size_t len = static_cast<std::size_t>(nrows * plan.cols);
      const float* x = src.view_rows(row0);
      if (!x) {
        auto& buf = buffers[static_cast<std::size_t>(t)];
        buf.resize(len);
        src.fill_rows(row0, nrows, buf.data());
        x = buf.data();
      }
      work(t, ChunkData{x, len, row0 * plan.cols});
    });
    after_wave(n);
  }
}

int pass_threads(const FitOptions& opt, const ChunkPlan& plan) {
  return static_cast<int>(std::max<std::uint64_t>(
      1, std::min<std::uint64_t>(static_cast<std::uint64_t>(fit_detail::resolve_threads(opt.threads)), plan.chunks)));
}

// ---- pass 1 --------------------------------------------------------------------------

struct Pass1 {
  std::uint64_t nan = 0, inf = 0, zeros = 0, count = 0;
  float absmax = 0;
  Moments mom;
  std::vector<std::uint64_t> hc, hs;  // per bucket: count, sum of the low 16 key bits
  ExtremeSet hi, lo;
  SampleSet sample;
  std::vector<ChannelAcc> channels;
};

struct Pass1Slot {
  std::uint64_t nan = 0, inf = 0, zeros = 0;
  float absmax = 0;
  std::vector<std::uint64_t> hc = std::vector<std::uint64_t>(kBuckets, 0), hs = std::vector<std::uint64_t>(kBuckets, 0);
  ExtremeSet hi, lo;
  SampleSet sample;
  // This wave's chunk:
  Moments mom;
  std::vector<std::pair<std::uint64_t, ChannelAcc>> ch;
  std::vector<ChannelAcc> col_acc;  // axis-0 scratch
  std::vector<double> col_sum, col_d1, col_d2;
  std::vector<float> col_first;
  std::vector<char> col_same;
};

struct Layout {
  std::uint64_t L = 1;  // matrix columns
  int axis = 1;
  std::uint64_t channels = 0;
  bool measured = false;
};

// Per-channel partial sums of one chunk (two passes over each channel's part).
void chunk_channels(const ChunkData& c, const Layout& lay, Pass1Slot& s) {
  s.ch.clear();
  if (lay.axis == 1) {
    std::uint64_t f = c.f0;
    const std::uint64_t end = c.f0 + c.len;
    while (f < end) {
      const std::uint64_t ch = f / lay.L, seg_end = std::min(end, (ch + 1) * lay.L);
      const float* x = c.x + (f - c.f0);
      const std::size_t n = static_cast<std::size_t>(seg_end - f);
      ChannelAcc a;
      double sum = 0;
      float first = 0;
      bool same = true;
      for (std::size_t i = 0; i < n; ++i)
        if (std::isfinite(x[i])) {
          if (a.n == 0) first = x[i];
          same = same && x[i] == first;
          sum += x[i], ++a.n, a.absmax = std::max(a.absmax, std::abs(x[i]));
        }
      if (a.n && same) {
        a.mean = first;
      } else if (a.n) {
        const double nn = static_cast<double>(a.n), mean = sum / nn;
        double d1 = 0, d2 = 0;
        for (std::size_t i = 0; i < n; ++i)
          if (std::isfinite(x[i])) {
            const double d = x[i] - mean;
            d1 += d, d2 += d * d;
          }
        a.mean = mean + d1 / nn;
        a.m2 = std::max(0.0, d2 - d1 * d1 / nn);
      }
      s.ch.emplace_back(ch, a);
      f = seg_end;
    }
    return;
  }
  // Columns: element f belongs to column f % L; local slot j = i % L.
  const std::size_t touched = static_cast<std::size_t>(std::min<std::uint64_t>(lay.L, c.len));
  s.col_acc.assign(touched, ChannelAcc{});
  s.col_sum.assign(touched, 0);
  s.col_d1.assign(touched, 0);
  s.col_d2.assign(touched, 0);
  s.col_first.assign(touched, 0);
  s.col_same.assign(touched, 1);
  std::size_t j = 0;
  for (std::size_t i = 0; i < c.len; ++i) {
    const float v = c.x[i];
    if (std::isfinite(v)) {
      ChannelAcc& a = s.col_acc[j];
      if (a.n == 0) s.col_first[j] = v;
      s.col_same[j] = s.col_same[j] && v == s.col_first[j];
      s.col_sum[j] += v;
      ++a.n;
      a.absmax = std::max(a.absmax, std::abs(v));
    }
    if (++j == touched) j = 0;
  }
  for (std::size_t k = 0; k < touched; ++k)
    if (s.col_acc[k].n) s.col_acc[k].mean = s.col_sum[k] / static_cast<double>(s.col_acc[k].n);
  j = 0;
  for (std::size_t i = 0; i < c.len; ++i) {
    const float v = c.x[i];
    if (std::isfinite(v)) {
      const double d = v - s.col_acc[j].mean;
      s.col_d1[j] += d;
      s.col_d2[j] += d * d;
    }
    if (++j == touched) j = 0;
  }
  const std::uint64_t c0 = c.f0 % lay.L;
  for (std::size_t k = 0; k < touched; ++k) {
    ChannelAcc a = s.col_acc[k];
    if (a.n && s.col_same[k]) {
      a.mean = s.col_first[k];
    } else if (a.n) {
      const double nn = static_cast<double>(a.n);
      a.mean += s.col_d1[k] / nn;
      a.m2 = std::max(0.0, s.col_d2[k] - s.col_d1[k] * s.col_d1[k] / nn);
    }
    s.ch.emplace_back((c0 + k) % lay.L, a);
  }
}

// Columns as channels keep per-column partial sums for each chunk in flight (about 100
// bytes per column touched); smaller chunks bound that memory per thread.
constexpr std::uint64_t kColumnChunkElements = std::uint64_t{1} << 16;

Pass1 run_pass1(const TensorSource& src, const FitOptions& opt, const Layout& lay, std::uint64_t rng_key,
                bool sample_all) {
  const ChunkPlan plan(src, lay.axis == 0 && lay.measured ? std::min(opt.chunk_elements, kColumnChunkElements)
                                                          : opt.chunk_elements);
  Pass1 r;
  r.hi = ExtremeSet(opt.outliers, true);
  r.lo = ExtremeSet(opt.outliers, false);
  r.sample = SampleSet(opt.subsample);
  r.hc.assign(kBuckets, 0);
  r.hs.assign(kBuckets, 0);
  if (lay.measured) r.channels.assign(static_cast<std::size_t>(lay.channels), ChannelAcc{});
  if (plan.chunks == 0) return r;
  const int T = pass_threads(opt, plan);
  WavePool pool(T);
  std::vector<std::vector<float>> buffers(static_cast<std::size_t>(T));
  std::vector<Pass1Slot> slots(static_cast<std::size_t>(T));
  for (auto& s : slots) {
    s.hi = ExtremeSet(opt.outliers, true);
    s.lo = ExtremeSet(opt.outliers, false);
    s.sample = SampleSet(opt.subsample);
  }
  auto work = [&](int t, const ChunkData& c) {
    Pass1Slot& s = slots[static_cast<std::size_t>(t)];
    for (std::size_t i = 0; i < c.len; ++i) {
      const float v = c.x[i];
      if (!std::isfinite(v)) {
        ++(std::isnan(v) ? s.nan : s.inf);
        continue;
      }
      const std::uint32_t key = order_key(v);
      ++s.hc[key >> 16];
      s.hs[key >> 16] += key & 0xFFFFu;
      s.zeros += v == 0;
      s.absmax = std::max(s.absmax, std::abs(v));
      const std::uint64_t f = c.f0 + i;
      s.hi.offer(v, 0, f);
      s.lo.offer(v, 0, f);
      if (sample_all) s.sample.add({rng::splitmix64(rng_key, f), v, 0});
    }
    s.mom = chunk_moments(c.x, c.len);
    if (lay.measured) chunk_channels(c, lay, s);
  };
  auto after = [&](int n) {
    for (int t = 0; t < n; ++t) {
      Pass1Slot& s = slots[static_cast<std::size_t>(t)];
      r.mom.merge(s.mom);
      if (lay.measured)
        for (const auto& [ch, a] : s.ch) r.channels[static_cast<std::size_t>(ch)].merge(a);
    }
  };
  for_each_chunk(src, plan, pool, buffers, work, after);
  for (auto& s : slots) {
    r.nan += s.nan, r.inf += s.inf, r.zeros += s.zeros;
    r.absmax = std::max(r.absmax, s.absmax);
    for (std::size_t b = 0; b < kBuckets; ++b) r.hc[b] += s.hc[b], r.hs[b] += s.hs[b];
    r.hi.absorb(s.hi, 0);
    r.lo.absorb(s.lo, 0);
    r.sample.absorb(s.sample, 0);
  }
  for (std::uint64_t c : r.hc) r.count += c;
  return r;
}

// ---- pass 2 (and the total's extra pass) ---------------------------------------------

struct Buckets {
  std::uint32_t lo = 0, hi = 0;  // buckets of the two middle ranks
  std::uint64_t below_lo = 0;    // values in buckets under `lo`
};

// The buckets holding ranks (n-1)/2 and n/2 (0-based) of n = sum of hc.
Buckets median_buckets(const std::vector<std::uint64_t>& hc, std::uint64_t n) {
  Buckets b;
  const std::uint64_t k1 = (n - 1) / 2, k2 = n / 2;
  std::uint64_t cum = 0;
  bool have_lo = false;
  for (std::uint32_t i = 0; i < kBuckets; ++i) {
    if (!have_lo && cum + hc[i] > k1) b.lo = i, b.below_lo = cum, have_lo = true;
    if (cum + hc[i] > k2) {
      b.hi = i;
      break;
    }
    cum += hc[i];
  }
  return b;
}

struct Pass2 {
  std::uint64_t beyond3 = 0, beyond6 = 0;
  std::vector<std::uint64_t> low_lo = std::vector<std::uint64_t>(kBuckets, 0),
                             low_hi = std::vector<std::uint64_t>(kBuckets, 0);
  SampleSet sample;
  void absorb(const Pass2& o) {
    beyond3 += o.beyond3, beyond6 += o.beyond6;
    for (std::size_t k = 0; k < kBuckets; ++k) low_lo[k] += o.low_lo[k], low_hi[k] += o.low_hi[k];
    sample.absorb(o.sample, 0);
  }
};

struct Pass2Params {
  double mean = 0, sd = 0;
  Buckets buckets;
  bool sample = false;
  std::uint64_t threshold = 0;  // keys below it are sampled
  std::uint64_t rng_key = 0;
  std::uint32_t source = 0;
};

Pass2 run_pass2(const TensorSource& src, const FitOptions& opt, const Pass2Params& p) {
  const ChunkPlan plan(src, opt.chunk_elements);
  Pass2 r;
  r.sample = SampleSet(opt.subsample);
  if (plan.chunks == 0) return r;
  const int T = pass_threads(opt, plan);
  WavePool pool(T);
  std::vector<std::vector<float>> buffers(static_cast<std::size_t>(T));
  std::vector<Pass2> slots(static_cast<std::size_t>(T));
  for (auto& s : slots) s.sample = SampleSet(opt.subsample);
  const double t3 = 3 * p.sd, t6 = 6 * p.sd;
  auto work = [&](int t, const ChunkData& c) {
    Pass2& s = slots[static_cast<std::size_t>(t)];
    for (std::size_t i = 0; i < c.len; ++i) {
      const float v = c.x[i];
      if (!std::isfinite(v)) continue;
      const double d = std::abs(v - p.mean);
      s.beyond3 += d > t3;
      s.beyond6 += d > t6;
      const std::uint32_t key = order_key(v), b = key >> 16;
      if (b == p.buckets.lo)
        ++s.low_lo[key & 0xFFFFu];
      else if (b == p.buckets.hi)
        ++s.low_hi[key & 0xFFFFu];
      if (p.sample) {
        const std::uint64_t rk = rng::splitmix64(p.rng_key, c.f0 + i);
        if (rk < p.threshold) s.sample.add({rk, v, p.source});
      }
    }
  };
  for_each_chunk(src, plan, pool, buffers, work, [](int) {});
  for (auto& s : slots) r.absorb(s);
  return r;
}

// The value of rank k (0-based) given the buckets' counts and the low-bit histograms of the
// median buckets.
double ranked_value(std::uint64_t k, const Buckets& b, const std::vector<std::uint64_t>& hc,
                    const std::vector<std::uint64_t>& low_lo, const std::vector<std::uint64_t>& low_hi) {
  std::uint64_t cum = b.below_lo;
  auto scan = [&](std::uint32_t bucket, const std::vector<std::uint64_t>& low, double& out) {
    for (std::uint32_t j = 0; j < kBuckets; ++j) {
      if (cum + low[j] > k) {
        out = bucket_value(bucket, j);
        return true;
      }
      cum += low[j];
    }
    return false;
  };
  double v = NAN;
  if (scan(b.lo, low_lo, v)) return v;
  if (b.hi != b.lo) {
    cum = b.below_lo + hc[b.lo];
    if (scan(b.hi, low_hi, v)) return v;
  }
  return NAN;
}

// sum |x - m| from the buckets' counts and low-bit sums (exact terms per bucket) and, for the
// median buckets, their full histograms.
double abs_deviation_sum(double m, const Buckets& b, const std::vector<std::uint64_t>& hc,
                         const std::vector<std::uint64_t>& hs, const std::vector<std::uint64_t>& low_lo,
                         const std::vector<std::uint64_t>& low_hi) {
  CompensatedSum acc;
  for (std::uint32_t i = 0; i < kBuckets; ++i) {
    const std::uint64_t cnt = hc[i];
    if (cnt == 0) continue;
    if (i == b.lo || i == b.hi) {
      const auto& low = i == b.lo ? low_lo : low_hi;
      for (std::uint32_t j = 0; j < kBuckets; ++j)
        if (low[j]) acc.add(static_cast<double>(low[j]) * std::abs(bucket_value(i, j) - m));
      continue;
    }
    const double ulp = bucket_ulp(i), dc = static_cast<double>(cnt);
    if (i < b.lo) {  // every value below m: m - x = (m - top) + (0xFFFF - k) ulp
      acc.add(dc * (m - bucket_value(i, 0xFFFF)));
      acc.add(ulp * static_cast<double>(0xFFFFull * cnt - hs[i]));
    } else {  // above: x - m = (base - m) + k ulp
      acc.add(dc * (bucket_value(i, 0) - m));
      acc.add(ulp * static_cast<double>(hs[i]));
    }
  }
  return acc.value();
}

double median_of(std::vector<double> v) {
  if (v.empty()) return NAN;
  const std::size_t n = v.size(), h = n / 2;
  std::nth_element(v.begin(), v.begin() + static_cast<std::ptrdiff_t>(h), v.end());
  const double upper = v[h];
  if (n % 2) return upper;
  const double lower = *std::max_element(v.begin(), v.begin() + static_cast<std::ptrdiff_t>(h));
  return 0.5 * (lower + upper);
}

double max_of(const std::vector<double>& v) {
  double m = -INFINITY;
  for (double x : v) m = std::max(m, x);
  return v.empty() ? NAN : m;
}

// Everything that merges into a total (what a source contributes and what a total holds).
struct Merged {
  std::uint64_t elements = 0, nan = 0, inf = 0, zeros = 0, count = 0;
  float absmax = 0;
  Moments mom;
  std::vector<std::uint64_t> hc = std::vector<std::uint64_t>(kBuckets, 0), hs = std::vector<std::uint64_t>(kBuckets, 0);
  ExtremeSet hi, lo;
  SampleSet sample;
  std::vector<float> ch_absmax;  // channels with a finite value (an absmax is a float32 value)
  std::vector<double> ch_std;
  std::uint64_t channels = 0;
  bool channels_measured = true;
  std::vector<std::string> names;  // per source

  Merged(const FitOptions& o) : hi(o.outliers, true), lo(o.outliers, false), sample(o.subsample) {}

  void absorb(const Merged& o, std::uint64_t max_channels) {
    const auto off = static_cast<std::uint32_t>(names.size());
    elements += o.elements, nan += o.nan, inf += o.inf, zeros += o.zeros, count += o.count;
    absmax = std::max(absmax, o.absmax);
    mom.merge(o.mom);
    for (std::size_t b = 0; b < kBuckets; ++b) hc[b] += o.hc[b], hs[b] += o.hs[b];
    hi.absorb(o.hi, off);
    lo.absorb(o.lo, off);
    sample.absorb(o.sample, off);
    channels += o.channels;
    channels_measured = channels_measured && o.channels_measured && ch_absmax.size() + o.ch_absmax.size() <= max_channels;
    if (channels_measured) {
      ch_absmax.insert(ch_absmax.end(), o.ch_absmax.begin(), o.ch_absmax.end());
      ch_std.insert(ch_std.end(), o.ch_std.begin(), o.ch_std.end());
    } else {
      ch_absmax = {}, ch_std = {};
    }
    names.insert(names.end(), o.names.begin(), o.names.end());
  }
};

// The statistics from the merged pass-1 data and a pass-2 result.
TensorStats make_stats(const std::string& name, Merged& m, const Pass2& p2, const Buckets& bk, const FitOptions& opt) {
  TensorStats st;
  st.name = name;
  st.elements = m.elements;
  st.count = m.count;
  st.nan = m.nan;
  st.infinite = m.inf;
  st.zeros = m.zeros;
  st.sources = m.names.size();
  st.channels = m.channels;
  st.channels_measured = m.channels_measured;
  st.channel_absmax_spread = st.channel_std_spread = NAN;
  if (m.channels_measured && !m.ch_absmax.empty()) {
    const std::vector<double> absmax(m.ch_absmax.begin(), m.ch_absmax.end());
    st.channel_absmax_spread = max_of(absmax) / median_of(absmax);
    st.channel_std_spread = max_of(m.ch_std) / median_of(m.ch_std);
  }
  if (m.count == 0) {
    st.mean = st.std = st.skewness = st.excess_kurtosis = st.absmax = st.crest = st.median = NAN;
    st.beyond_3sigma = st.beyond_6sigma = st.zero_fraction = NAN;
    return st;
  }
  const double n = static_cast<double>(m.count);
  st.mean = m.mom.mean;
  const double m2 = m.mom.m2 / n;
  st.std = std::sqrt(m2);
  st.skewness = (m.mom.m3 / n) / (m2 * st.std);
  st.excess_kurtosis = (m.mom.m4 / n) / (m2 * m2) - 3;
  st.absmax = m.absmax;
  st.crest = st.absmax / st.std;
  st.beyond_3sigma_count = p2.beyond3;
  st.beyond_6sigma_count = p2.beyond6;
  st.beyond_3sigma = static_cast<double>(p2.beyond3) / n;
  st.beyond_6sigma = static_cast<double>(p2.beyond6) / n;
  st.zero_fraction = static_cast<double>(m.zeros) / n;
  const double v1 = ranked_value((m.count - 1) / 2, bk, m.hc, p2.low_lo, p2.low_hi);
  const double v2 = ranked_value(m.count / 2, bk, m.hc, p2.low_lo, p2.low_hi);
  st.median = 0.5 * (v1 + v2);

  // Outliers: the largest |x - mean| are among the N largest and the N smallest values.
  if (st.std > 0 && opt.outliers > 0) {
    std::vector<Extreme> cand = m.hi.values();
    cand.insert(cand.end(), m.lo.values().begin(), m.lo.values().end());
    std::sort(cand.begin(), cand.end(), [&](const Extreme& a, const Extreme& b) {
      const double da = std::abs(a.value - st.mean), db = std::abs(b.value - st.mean);
      if (da != db) return da > db;
      if (a.source != b.source) return a.source < b.source;
      return a.index < b.index;
    });
    cand.erase(std::unique(cand.begin(), cand.end(),
                           [](const Extreme& a, const Extreme& b) { return a.source == b.source && a.index == b.index; }),
               cand.end());
    if (cand.size() > static_cast<std::size_t>(opt.outliers)) cand.resize(static_cast<std::size_t>(opt.outliers));
    for (const auto& e : cand)
      st.outliers.push_back({e.source, e.source < m.names.size() ? m.names[e.source] : std::string(), e.index,
                             e.value, (e.value - st.mean) / st.std});
  }

  // Fits on the subsample.
  const std::vector<double> xs = m.sample.sorted_values();
  st.sample_size = xs.size();
  st.subsampled = st.sample_size < st.count;
  if (!(st.std > 0) || xs.empty()) return st;
  const int threads = fit_detail::resolve_threads(opt.threads);
  const double ns = static_cast<double>(xs.size());
  const double b_laplace = abs_deviation_sum(st.median, bk, m.hc, m.hs, p2.low_lo, p2.low_hi) / n;
  auto mean_log_pdf = [&](const Model& md) {
    const auto parts = fit_detail::map_blocks<CompensatedSum>(xs.size(), 16384, threads, [&](std::size_t b, std::size_t e) {
      CompensatedSum s;
      for (std::size_t i = b; i < e; ++i) s.add(md.log_pdf(xs[i]));
      return s;
    });
    CompensatedSum s;
    for (const auto& p : parts) s.add(p);
    return s.value() / ns;
  };
  auto add_fit = [&](const Model& md, double ll, bool converged) {
    DistributionFit f;
    f.family = family_name(md.family);
    f.loc = md.loc, f.scale = md.scale;
    f.nu = md.family == Family::student_t ? md.nu : NAN;
    f.converged = converged;
    f.log_likelihood = ll;
    f.ks = f.ad = f.bic = NAN;
    if (std::isfinite(md.loc) && md.scale > 0 && std::isfinite(md.scale) &&
        (md.family != Family::student_t || md.nu > 0)) {
      const EdfDistances e = edf_distances(xs, md, threads);
      f.ks = e.ks, f.ad = e.ad;
      f.bic = ns * ll - 0.5 * md.parameters() * std::log(ns);
    }
    st.fits.push_back(f);
  };
  const Model g{Family::gauss, st.mean, st.std, 0};
  add_fit(g, mean_log_pdf(g), true);
  const Model l{Family::laplace, st.median, b_laplace, 0};
  add_fit(l, mean_log_pdf(l), b_laplace > 0);
  const StudentTFit t = fit_student_t(xs, threads);
  add_fit(Model{Family::student_t, t.loc, t.scale, t.nu}, t.log_likelihood, t.converged);
  double best = -INFINITY;
  for (const auto& f : st.fits)
    if (f.converged && std::isfinite(f.bic) && f.bic > best) best = f.bic, st.best_fit = f.family;
  return st;
}

Layout make_layout(const TensorSource& src, const FitOptions& opt, const ChannelLayout& cl) {
  Layout lay;
  lay.axis = cl.axis;
  if (cl.axis != 0 && cl.axis != 1)
    throw usage_error(fmt::format("channel axis {}", cl.axis), src.name(), "use 1 (rows are channels) or 0 (columns)");
  const std::uint64_t n = src.rows() * src.cols();
  lay.L = cl.cols ? cl.cols : src.cols();
  if (n == 0) {
    lay.channels = 0;
    return lay;
  }
  if (lay.L == 0 || n % lay.L != 0)
    throw usage_error(fmt::format("a matrix of {} columns does not hold its {} elements", lay.L, n), src.name(),
                      "give the column count of the folded matrix");
  lay.channels = lay.axis == 1 ? n / lay.L : lay.L;
  lay.measured = lay.channels <= opt.max_channels;
  return lay;
}

constexpr std::uint64_t kMaxSubsample = std::uint64_t{1} << 22;

void check_options(const FitOptions& opt, const std::string& where) {
  if (opt.subsample < 16)
    throw usage_error(fmt::format("subsample of {} values", opt.subsample), where,
                      "the fits and distances need at least 16 values");
  if (opt.subsample > kMaxSubsample)
    throw usage_error(fmt::format("subsample of {} values", opt.subsample), where,
                      fmt::format("at most {} (the sample is held in memory, about 40 bytes a value)", kMaxSubsample));
  if (opt.outliers < 0 || opt.outliers > 100000)
    throw usage_error(fmt::format("{} outliers", opt.outliers), where, "ask for 0 to 100000");
  if (opt.chunk_elements == 0) throw usage_error("chunk of 0 elements", where);
}

std::uint64_t sample_threshold(std::uint64_t count, std::uint64_t keep, double slack) {
  const double want = static_cast<double>(keep) + slack;
  if (static_cast<double>(count) <= 2 * want) return std::numeric_limits<std::uint64_t>::max();
  return static_cast<std::uint64_t>(std::ldexp(want / static_cast<double>(count), 64));
}

}  // namespace

struct FitSummary {
  explicit FitSummary(const FitOptions& o) : m(o) {}
  Merged m;
};
void FitSummaryDeleter::operator()(FitSummary* s) const { delete s; }

std::vector<double> sample_values(const FitSummary& s) {
  SampleSet copy = s.m.sample;
  return copy.sorted_values();
}

std::uint64_t name_stream(std::string_view text) {
  std::uint64_t h = 0xcbf29ce484222325ull;
  for (unsigned char c : text) h = (h ^ c) * 0x100000001b3ull;
  return h;
}

Model DistributionFit::model() const {
  Model m;
  m.family = family == "laplace" ? Family::laplace : family == "student-t" ? Family::student_t : Family::gauss;
  m.loc = loc, m.scale = scale, m.nu = nu;
  return m;
}

const DistributionFit* TensorStats::fit(std::string_view family) const {
  for (const auto& f : fits)
    if (f.family == family) return &f;
  return nullptr;
}

SourceFit fit_source_with_summary(const TensorSource& src, const FitOptions& opt, const ChannelLayout& cl,
                                  std::optional<std::uint64_t> stream) {
  const std::string name = src.name();
  check_options(opt, name);
  const Layout lay = make_layout(src, opt, cl);
  const std::uint64_t rng_key = rng::stream_key(opt.seed, stream ? *stream : name_stream(name));
  const std::uint64_t elements = src.rows() * src.cols();
  const bool sample_all = elements <= opt.subsample;
  Pass1 p1 = run_pass1(src, opt, lay, rng_key, sample_all);

  auto summary = FitSummaryPtr(new FitSummary(opt));
  Merged& m = summary->m;
  m.elements = elements;
  m.nan = p1.nan, m.inf = p1.inf, m.zeros = p1.zeros, m.count = p1.count;
  m.absmax = p1.absmax;
  m.mom = p1.mom;
  m.hc = std::move(p1.hc);
  m.hs = std::move(p1.hs);
  m.hi = std::move(p1.hi);
  m.lo = std::move(p1.lo);
  m.channels = lay.channels;
  m.channels_measured = lay.measured;
  for (const auto& a : p1.channels)
    if (a.n) {
      m.ch_absmax.push_back(a.absmax);
      m.ch_std.push_back(std::sqrt(a.m2 / static_cast<double>(a.n)));
    }
  p1.channels = {};
  m.names = {name};

  Buckets bk;
  Pass2 p2;
  if (m.count > 0) {
    bk = median_buckets(m.hc, m.count);
    Pass2Params pp;
    pp.mean = m.mom.mean;
    pp.sd = std::sqrt(m.mom.m2 / static_cast<double>(m.count));
    pp.buckets = bk;
    pp.rng_key = rng_key;
    pp.sample = !sample_all;
    // Keys below the threshold: about keep + slack values, Binomial; fewer than `keep`
    // (about 8 standard deviations short) is redone with a wider margin.
    double slack = 8 * std::sqrt(static_cast<double>(opt.subsample)) + 64;
    for (;;) {
      pp.threshold = sample_threshold(m.count, opt.subsample, slack);
      p2 = run_pass2(src, opt, pp);
      if (!pp.sample || p2.sample.size() >= std::min(opt.subsample, m.count) ||
          pp.threshold == std::numeric_limits<std::uint64_t>::max())
        break;
      slack *= 4;
    }
    m.sample = pp.sample ? std::move(p2.sample) : std::move(p1.sample);
    m.sample.prune();
  }
  SourceFit out;
  out.stats = make_stats(name, m, p2, bk, opt);
  out.stats.sources = 1;
  out.summary = std::move(summary);
  return out;
}

TensorStats fit_source(const TensorSource& src, const FitOptions& opt, const ChannelLayout& layout,
                       std::optional<std::uint64_t> stream) {
  return fit_source_with_summary(src, opt, layout, stream).stats;
}

// ---- totals ----------------------------------------------------------------------------

struct FitTotal::State {
  explicit State(FitOptions o) : opt(std::move(o)), m(opt) {}
  FitOptions opt;
  Merged m;
  std::vector<const TensorSource*> sources;
  std::optional<TensorStats> single;  // while there is exactly one source
};

FitTotal::FitTotal(FitOptions opt) : s_(std::make_unique<State>(std::move(opt))) {
  check_options(s_->opt, "total");
}
FitTotal::~FitTotal() = default;
FitTotal::FitTotal(FitTotal&&) noexcept = default;
FitTotal& FitTotal::operator=(FitTotal&&) noexcept = default;

std::uint64_t FitTotal::sources() const { return s_->sources.size(); }

std::vector<double> FitTotal::sample_values() const {
  SampleSet copy = s_->m.sample;
  return copy.sorted_values();
}

void FitTotal::add(const TensorSource& src, SourceFit fit) {
  if (!fit.summary) throw Error(Error::Kind::internal, "FitTotal::add: a fit without its summary");
  s_->single = s_->sources.empty() ? std::optional<TensorStats>(std::move(fit.stats)) : std::nullopt;
  s_->m.absorb(fit.summary->m, s_->opt.max_total_channels);
  s_->sources.push_back(&src);
}

void FitTotal::merge(FitTotal&& o) {
  if (o.s_->sources.empty()) return;
  const bool was_empty = s_->sources.empty();
  s_->m.absorb(o.s_->m, s_->opt.max_total_channels);
  s_->sources.insert(s_->sources.end(), o.s_->sources.begin(), o.s_->sources.end());
  s_->single = was_empty && s_->sources.size() == 1 ? std::move(o.s_->single) : std::nullopt;
  o.s_->sources.clear();
}

TensorStats FitTotal::finish(const std::string& name) {
  State& s = *s_;
  if (s.sources.size() == 1 && s.single) {
    TensorStats st = *s.single;
    st.name = name;
    return st;
  }
  Buckets bk;
  Pass2 p2;
  if (s.m.count > 0) {
    bk = median_buckets(s.m.hc, s.m.count);
    Pass2Params pp;
    pp.mean = s.m.mom.mean;
    pp.sd = std::sqrt(s.m.mom.m2 / static_cast<double>(s.m.count));
    pp.buckets = bk;
    for (const TensorSource* src : s.sources) p2.absorb(run_pass2(*src, s.opt, pp));
  }
  TensorStats st = make_stats(name, s.m, p2, bk, s.opt);
  st.sources = s.sources.size();
  return st;
}

}  // namespace lobit
