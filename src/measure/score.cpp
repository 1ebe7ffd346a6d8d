#include "lobit/measure/score.hpp"

#include <algorithm>
#include <atomic>
#include <bit>
#include <cmath>
#include <cstring>
#include <fmt/format.h>
#include <numeric>
#include <thread>

#include "lobit/detail/parallel.hpp"
#include "lobit/error.hpp"
#include "lobit/measure/fused_kernels.hpp"

namespace lobit {

MemorySource::MemorySource(std::span<const float> data, std::uint64_t rows, std::uint64_t cols, std::string name)
    : data_(data), rows_(rows), cols_(cols), name_(std::move(name)) {
  if (data.size() != rows * cols)
    throw usage_error(fmt::format("{} values for a {} x {} tensor", data.size(), rows, cols), name_);
}

void MemorySource::fill_rows(std::uint64_t row0, std::uint64_t nrows, float* out) const {
  std::memcpy(out, data_.data() + row0 * cols_, nrows * cols_ * sizeof(float));
}

namespace {

// Magnitude histogram on the top 16 bits of the float32 pattern of |x|
// (bins 2^-7 wide in relative terms): the threshold of the largest fraction.
//
// Only the bins from the threshold up matter (and the count of NaN/inf). With
// bound >= every top count the tensor can ask for (ceil(fraction * elements)),
// any bin L with at least `bound` finite inputs at or above it seen so far is a
// lower bound of the final threshold (counts only grow), so from then on inputs
// below bin L are not counted: bins at or above the last such L are complete, and
// threshold() stops at the first bin from the top that reaches the count, which
// lies at or above every L of every thread. The result is the full histogram's.
struct MagnitudeHistogram {
  std::vector<std::uint64_t> bins = std::vector<std::uint64_t>(1 << 15, 0);
  std::uint64_t bound = 0;     // 0: count every input
  std::uint32_t floor_bin = 0;  // inputs in lower bins are not counted
  // NaN and infinities fall into bins 0x7f80 and up, which no finite float32
  // reaches (0x7f7fffff >> 16 = 0x7f7f) and every floor lies below.
  static constexpr std::uint32_t kNonfinite = 0x7f80;
  void add(const float* x, std::size_t n) {
    std::uint64_t* b = bins.data();
    if (floor_bin == 0) {
      for (std::size_t i = 0; i < n; ++i) ++b[(std::bit_cast<std::uint32_t>(x[i]) & 0x7fffffffu) >> 16];
    } else if (!fused::high_bins_avx512(x, n, floor_bin << 16, b)) {
      const std::uint32_t lo = floor_bin << 16;
      for (std::size_t i = 0; i < n; ++i) {
        const std::uint32_t a = std::bit_cast<std::uint32_t>(x[i]) & 0x7fffffffu;
        if (a >= lo) ++b[a >> 16];
      }
    }
    if (!bound) return;
    std::uint64_t acc = 0;
    for (std::uint32_t k = kNonfinite; k-- > floor_bin;) {
      acc += b[k];
      if (acc >= bound) {
        floor_bin = k;
        break;
      }
    }
  }
  // Clears the NaN/inf bins and returns how many inputs they held.
  std::uint64_t finish() {
    std::uint64_t nonfinite = 0;
    for (std::size_t k = kNonfinite; k < bins.size(); ++k) nonfinite += bins[k], bins[k] = 0;
    return nonfinite;
  }
  // The lower edge of the bin where the top `count` elements begin.
  double threshold(std::uint64_t count) const {
    std::uint64_t acc = 0;
    for (std::size_t b = bins.size(); b-- > 0;) {
      acc += bins[b];
      if (acc >= count) return static_cast<double>(std::bit_cast<float>(static_cast<std::uint32_t>(b << 16)));
    }
    return 0;
  }
};

}  // namespace

ScoreResult score(const std::vector<std::shared_ptr<const ScaledFormat>>& formats, const TensorSource& source,
                  const ScoreOptions& o) {
  if (formats.empty()) throw usage_error("no format to score", "score", "name at least one format");
  const std::uint64_t rows = source.rows(), cols = source.cols();
  if (rows == 0 || cols == 0) throw usage_error("the source is empty", source.name());
  ScoreResult res;
  res.elements = rows * cols;

  // Chunks of whole rows; for blocks down columns, a multiple of every block size.
  std::uint64_t chunk_rows = std::max<std::uint64_t>(1, o.chunk_elements / cols);
  if (o.axis == 0) {
    std::uint64_t m = 1;
    for (const auto& f : formats)
      if (f->granularity == Granularity::block) m = std::lcm(m, static_cast<std::uint64_t>(f->block));
    chunk_rows = std::max<std::uint64_t>(m, chunk_rows / m * m);
  }
  chunk_rows = std::min(chunk_rows, rows);
  const std::uint64_t nchunks = (rows + chunk_rows - 1) / chunk_rows;
  res.chunks = nchunks;

  // Pre-pass: the magnitude histogram and every plan that needs the data.
  std::vector<PlanBuilder> builders;
  builders.reserve(formats.size());
  for (const auto& f : formats) builders.emplace_back(*f, rows, cols, o.axis);
  MagnitudeHistogram mh;
  // Every top count below is at most this (finite <= rows * cols).
  const auto top_bound = std::max<std::uint64_t>(
      static_cast<std::uint64_t>(std::ceil(o.top_fraction * static_cast<double>(rows * cols))), 1);
  mh.bound = top_bound;
  std::uint64_t finite = 0;
  int threads = o.threads > 0 ? o.threads : static_cast<int>(std::max(1u, std::thread::hardware_concurrency()));
  threads = static_cast<int>(std::min<std::uint64_t>(static_cast<std::uint64_t>(threads), nchunks));
  auto rows_of = [&](std::uint64_t r0, std::uint64_t nr, std::vector<float>& buf) -> const float* {
    if (const float* p = source.view_rows(r0)) return p;
    buf.resize(nr * cols);
    source.fill_rows(r0, nr, buf.data());
    return buf.data();
  };
  bool any_plan = false;
  for (auto& b : builders) any_plan |= b.needs_data();
  if (any_plan) {
    // Plans see the rows in order: one thread.
    std::vector<float> buf;
    for (std::uint64_t c = 0; c < nchunks; ++c) {
      const std::uint64_t r0 = c * chunk_rows, nr = std::min(chunk_rows, rows - r0);
      const float* d = rows_of(r0, nr, buf);
      mh.add(d, nr * cols);
      for (auto& b : builders)
        if (b.needs_data()) b.add_rows(r0, nr, d);
    }
  } else {
    // Only the magnitude histogram: integer counts, merged in any order.
    std::vector<MagnitudeHistogram> part(static_cast<std::size_t>(threads));
    for (auto& p : part) p.bound = top_bound;
    std::atomic<std::uint64_t> next_pre{0};
    auto pre = [&](int t) {
      std::vector<float> buf;
      for (;;) {
        const std::uint64_t c = next_pre.fetch_add(1);
        if (c >= nchunks) break;
        const std::uint64_t r0 = c * chunk_rows, nr = std::min(chunk_rows, rows - r0);
        part[static_cast<std::size_t>(t)].add(rows_of(r0, nr, buf), nr * cols);
      }
    };
    detail::run_threads(threads, pre);
    for (auto& p : part)
      for (std::size_t b = 0; b < p.bins.size(); ++b) mh.bins[b] += p.bins[b];
  }
  finite = rows * cols - mh.finish();
  std::vector<TensorPlan> plans;
  for (auto& b : builders) plans.push_back(b.finish());
  const auto top_count = static_cast<std::uint64_t>(std::ceil(o.top_fraction * static_cast<double>(finite)));
  res.top_threshold = mh.threshold(std::max<std::uint64_t>(top_count, 1));

  // Main pass: chunks in parallel, float sums kept per chunk and merged in order.
  res.threads = threads;
  const std::size_t nf = formats.size();
  std::vector<ErrorSums> per_chunk(nchunks * nf);
  std::vector<std::vector<std::vector<std::uint64_t>>> hists(static_cast<std::size_t>(threads));
  std::atomic<std::uint64_t> next{0}, done{0};
  auto worker = [&](int t) {
    std::vector<ErrorAccumulator> acc;
    for (std::size_t i = 0; i < nf; ++i) acc.emplace_back(*formats[i], res.top_threshold);
    std::vector<float> buf;
    for (;;) {
      const std::uint64_t c = next.fetch_add(1);
      if (c >= nchunks) break;
      const std::uint64_t r0 = c * chunk_rows, nr = std::min(chunk_rows, rows - r0);
      const float* data = rows_of(r0, nr, buf);
      for (std::size_t i = 0; i < nf; ++i) {
        acc[i].sums() = ErrorSums{};
        if (acc[i].rows_fused_ok(o.axis) && !o.unfused)
          acc[i].add_rows_fused(plans[i], r0, nr, data);
        else if (acc[i].fused_ok() && !o.unfused)
          scan_rows(*formats[i], plans[i], r0, nr, data, [&](const GroupView& g) { acc[i].add_fused(g); });
        else
          quantize_rows(*formats[i], plans[i], r0, nr, data, [&](const GroupView& g) { acc[i].add(g); });
        per_chunk[c * nf + i] = acc[i].sums();
      }
      const std::uint64_t d = done.fetch_add(1) + 1;
      if (t == 0 && o.progress) o.progress(d, nchunks);
    }
    for (auto& a : acc) hists[static_cast<std::size_t>(t)].push_back(std::move(a.histogram()));
  };
  detail::run_threads(threads, worker);

  for (std::size_t i = 0; i < nf; ++i) {
    const ScaledFormat& f = *formats[i];
    ErrorSums total;
    for (std::uint64_t c = 0; c < nchunks; ++c) total.merge(per_chunk[c * nf + i]);
    // Tensor and column groups: counted once each from the plan.
    if (f.granularity == Granularity::tensor || f.granularity == Granularity::col) {
      const GroupQuantizer q(f, plans[i].tensor_scale);
      auto count = [&](const GroupSummary& s) {
        const GroupScale g = q.choose(s);
        ++total.groups;
        total.saturated_groups += g.saturated;
        total.underflow_groups += g.underflow;
        total.nan_groups += g.nan;
      };
      if (f.granularity == Granularity::tensor) count(plans[i].tensor_summary);
      else for (const auto& s : plans[i].col_summary) count(s);
    }
    std::vector<std::uint64_t> hist;
    for (auto& th : hists) {
      if (th.size() <= i) continue;
      if (hist.empty()) hist.assign(th[i].size(), 0);
      for (std::size_t k = 0; k < th[i].size(); ++k) hist[k] += th[i][k];
    }
    ScoreRow row;
    row.format = f.text;
    row.bits_per_element = f.bits_per_element(rows, cols, o.axis);
    row.scale_bit_share = (row.bits_per_element - f.element->bits()) / row.bits_per_element;
    row.report = make_report(total, hist);
    row.sums = total;
    row.histogram = hist;
    row.top_threshold = res.top_threshold;
    row.ragged = plans[i].ragged;
    res.rows.push_back(std::move(row));
  }
  return res;
}

}  // namespace lobit
