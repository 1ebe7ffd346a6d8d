#pragma once
// Mergeable error accumulators. Floating sums are merged in a fixed order by
// the caller (chunk order), integer counts in any order, so results do not
// depend on the thread count.
#include <cstdint>
#include <memory>
#include <optional>
#include <vector>

#include "lobit/measure/fused_kernels.hpp"
#include "lobit/scale/quantize.hpp"

namespace lobit {

struct ErrorSums {
  std::uint64_t n = 0;          // finite inputs scored
  std::uint64_t nonzero = 0;    // of them, non-zero
  std::uint64_t clipped = 0;    // past the element's end values by more than half the end gap
  std::uint64_t zeroed = 0;     // non-zero inputs that quantized to 0
  std::uint64_t nonfinite = 0;  // NaN/inf inputs (kept out of every sum)
  std::uint64_t nan_outputs = 0;  // finite inputs in groups that decode to NaN (kept out)
  double sum_x = 0, sum_x2 = 0, sum_err2 = 0, sum_rel = 0;
  double max_abs_err = 0, max_abs_x = 0;
  std::uint64_t top_n = 0;      // inputs at or above the top-magnitude threshold
  double top_err2 = 0;
  // Groups as resampling units for the confidence interval of the MSE.
  std::uint64_t units = 0;
  double u_e = 0, u_e2 = 0, u_n = 0, u_n2 = 0, u_en = 0;
  std::uint64_t groups = 0, saturated_groups = 0, underflow_groups = 0, nan_groups = 0;

  void merge(const ErrorSums& o);
};

// Accumulates the groups quantize_rows hands out.
class ErrorAccumulator {
 public:
  ErrorAccumulator(const ScaledFormat& f, double top_threshold);

  void add(const GroupView& g);
  // The fused loop: quantizes and accumulates a group handed out by scan_rows
  // (same sums as quantize + add, in the same order). Needs a table encoder
  // and no micro-exponents: fused_ok() says so.
  void add_fused(const GroupView& g);
  bool fused_ok() const { return f_.element_table && !f_.sub_block; }
  // Rows row0 .. row0 + nrows - 1 of a block format along axis 1: the same groups,
  // summaries, scales and sums as scan_rows with add_fused, without the visitor
  // (rows_fused_ok() says where it applies).
  void add_rows_fused(const TensorPlan& plan, std::uint64_t row0, std::uint64_t nrows, const float* data);
  bool rows_fused_ok(int axis) const {
    return fused_ok() && axis == 1 && f_.granularity == Granularity::block && !f_.scales && !f_.zero &&
           f_.rule != ScaleRule::mse;
  }
  // The sums (the vector kernels' lane sums are added first).
  ErrorSums& sums() {
    flush_lanes();
    return s_;
  }
  const ErrorSums& sums() const {
    flush_lanes();
    return s_;
  }
  // Element code usage (pending vector-kernel counts are added first).
  std::vector<std::uint64_t>& histogram();
  // Whether add_fused runs the vector kernels here (formats of up to 256 values on AVX-512 CPUs).
  bool vector_kernels() const { return vec_; }

 private:
  void add_unit(double ue, std::uint64_t un);  // one group: squared-error sum and count
  void count_group(const GroupScale& sc);      // one group's scale flags
  void flush_lanes() const {
    if (lanes_.pending)
      fused::flush_lanes(lanes_, s_.sum_x, s_.sum_x2, s_.sum_rel, s_.top_err2, s_.max_abs_err, s_.max_abs_x,
                         s_.nonzero, s_.zeroed, s_.top_n, s_.clipped);
  }
  std::shared_ptr<const GroupQuantizer> rows_q_;  // add_rows_fused's quantizer
  mutable fused::LaneSums lanes_;  // the kernels' sums not yet in s_ (flushed when s_ is read)
  fused::KernelTable kt_;   // the element table in the kernels' layout
  fused::HistState hs_;     // index counts not yet added to hist_
  fused::WideKernelTable wkt_;  // formats of 17 to 256 values: the wide kernel's table
  fused::WideHist whs_;
  bool vec_ = false;
  bool wide_ = false;       // vec_ with the wide kernel
  const ScaledFormat& f_;
  double top_threshold_;
  mutable ErrorSums s_;
  std::vector<std::uint64_t> hist_;  // element code usage (formats up to 16 bits)
};

struct ErrorReport {
  std::uint64_t n = 0;
  double mse = 0, mse_normalised = 0;
  std::optional<double> sqnr_db;  // empty when lossless
  bool lossless = false;
  double mse_stderr = 0;           // from the group-level spread
  std::optional<double> sqnr_low, sqnr_high;  // 95% interval
  double max_abs_err = 0, max_err_rel_absmax = 0, mean_rel_err = 0;
  double clip_rate = 0, zero_rate = 0;
  std::uint64_t top_n = 0;
  double top_mse = 0;
  std::uint64_t codes_used = 0;
  double entropy_bits = 0;
  std::uint64_t groups = 0, saturated_groups = 0, underflow_groups = 0, nan_groups = 0, nonfinite = 0;
};

ErrorReport make_report(const ErrorSums& s, const std::vector<std::uint64_t>& hist);

}  // namespace lobit
