#pragma once
// Quantizing groups and tensors with a scaled format: the exact definition
// every fast path and every generated kernel must reproduce.
//
// For a group with decoded scale s (s = tensor scale * stored block scale):
//   code = encode_element(x / s)       x / s is the correctly rounded binary64 quotient;
//                                      elements always saturate (Overflow::saturate)
//   value = s * decode(code)           binary64 product
// Affine groups (zero=FMT): s = (max - min) / qmax rounded into the scale format,
//   z = -min / s rounded into the zero format (nearest-even; unsigned ints clamp),
//   q = encode_unsigned(x / s + z), value = s * (q - z).
// Shared micro-exponents (sub=K2:D2): the block exponent E comes from the MX
//   rule; each K2-element sub-block takes the offset d = min(2^D2 - 1, E - e_sub),
//   e_sub its own MX exponent, and scale 2^(E - d).
#include <cstdint>
#include <span>
#include <type_traits>
#include <vector>

#include "lobit/scale/scaled_format.hpp"

namespace lobit {

// What a group's scale was and what happened choosing it.
struct GroupScale {
  double scale = 1;        // decoded scale the elements use (includes the tensor scale)
  Code scale_code = 0;     // code of the stored block scale
  double zero = 0;         // affine: decoded zero point
  Code zero_code = 0;
  bool saturated = false;  // the needed scale exceeded the scale format: elements clip
  bool underflow = false;  // the needed scale was below the scale format's smallest: group flushed
  bool nan = false;        // a NaN or infinity in the group: the group decodes to NaN
};

// Summary of a group's inputs (finite values only; nonfinite counted).
struct GroupSummary {
  double amax = 0, min = 0, max = 0;
  std::size_t nonfinite = 0;
};
GroupSummary summarize(const float* x, std::size_t n, std::size_t stride);
// The same summary by the plain loop (summarize takes a vector kernel where it applies).
GroupSummary summarize_scalar(const float* x, std::size_t n, std::size_t stride);

class GroupQuantizer {
 public:
  // tensor_scale: the decoded per-tensor scale of two-level formats (1 otherwise).
  explicit GroupQuantizer(const ScaledFormat& f, double tensor_scale = 1.0);

  const ScaledFormat& format() const { return f_; }
  double tensor_scale() const { return tensor_scale_; }

  // The scale for a group from its summary (rules mx, absmax, noclip). The mse
  // rule also needs the values (x, n, stride).
  GroupScale choose(const GroupSummary& s, const float* x = nullptr, std::size_t n = 0, std::size_t stride = 1) const;
  // The scale stored as given (double quantization hands in decoded scales).
  GroupScale with_scale(double decoded_block_scale, const GroupSummary& s) const;

  // Quantizes n strided elements with the chosen scale: codes and dequantized
  // values (either output may be null). Returns the sum of squared errors and
  // adds to *clipped the inputs that lie beyond the element's largest (or
  // smallest) value by more than half the gap next to it: those that saturation,
  // not rounding, brought back.
  double quantize(const float* x, std::size_t n, std::size_t stride, const GroupScale& g, Code* codes,
                  double* values, std::size_t* clipped = nullptr) const;

  // For micro-exponent formats: the per-sub-block scale offsets of a block.
  void sub_offsets(const float* x, std::size_t n, std::size_t stride, const GroupScale& g,
                   std::vector<int>& out) const;

  double element_max() const { return emax_value_; }
  double clip_low() const { return clip_lo_; }    // element-domain bounds of clipping
  double clip_high() const { return clip_hi_; }

 private:
  GroupScale from_target(double target, const GroupSummary& s, Rounding r) const;
  // amax / max(element) / tensor scale (no division by a tensor scale of 1: the same value).
  double amax_target(double amax) const {
    const double t = amax / emax_value_;
    return tensor_scale_ == 1.0 ? t : t / tensor_scale_;
  }

  const ScaledFormat& f_;
  double tensor_scale_;
  double emax_value_;       // element max magnitude (affine: qmax of the unsigned codes)
  int emax_exp_;            // ilogb(element max)
  int scale_lo_exp_ = 0, scale_hi_exp_ = 0;  // pow2 scale exponent range
  double clip_lo_ = 0, clip_hi_ = 0;  // element-domain bounds past which an input counts as clipped
  std::vector<Code> mx_codes_;   // rule mx: scale codes of 2^e, e = scale_lo_exp_ ... scale_hi_exp_
  std::vector<double> mx_pow_;   // and the values 2^e
};

// What quantizing a tensor needs beyond one chunk of rows: the per-tensor
// scale, per-column summaries, and (double quantization) every decoded group
// scale. Built by one pass over the data.
struct TensorPlan {
  std::uint64_t rows = 0, cols = 0;
  int axis = 1;
  double tensor_amax = 0;
  double tensor_scale = 1;                 // two-level formats
  GroupSummary tensor_summary;             // @tensor
  std::vector<GroupSummary> col_summary;   // @col
  std::vector<double> dq_scales;           // double quantization: decoded block scales by group index
  std::uint64_t group_count = 0;
  std::uint64_t blocks_along = 0;          // blocks per row (axis 1) or per column (axis 0)
  bool ragged = false;                     // the last block along the axis is short
};

// One pass that needs the whole tensor (row chunks in order through `next`).
class PlanBuilder {
 public:
  PlanBuilder(const ScaledFormat& f, std::uint64_t rows, std::uint64_t cols, int axis);
  // Rows row0 .. row0 + nrows - 1, row-major, in increasing order.
  void add_rows(std::uint64_t row0, std::uint64_t nrows, const float* data);
  TensorPlan finish();
  bool needs_data() const { return needs_data_; }  // false: the plan is known from the shape alone

 private:
  const ScaledFormat& f_;
  TensorPlan p_;
  bool needs_data_ = false;
  std::vector<double> first_level_;  // double quantization: first-level scales by group index
};

// Everything quantize_rows hands the visitor for one group.
struct GroupView {
  std::uint64_t index;          // group index (row-major over (row, block) for axis 1)
  const float* x;               // first input element
  std::size_t n, stride;
  const Code* codes;            // n codes
  const double* values;         // n dequantized values
  const GroupScale* scale;
  std::size_t clipped;          // inputs of the group that clipped (see GroupQuantizer::quantize)
  const class GroupQuantizer* quantizer;
};

// Quantizes rows row0 .. row0 + nrows - 1 (row-major data), calling visit(GroupView)
// for every group. For axis 0 blocks nrows must be a multiple of the block size
// unless the chunk ends the tensor.
template <class Visit>
void quantize_rows(const ScaledFormat& f, const TensorPlan& plan, std::uint64_t row0, std::uint64_t nrows,
                   const float* data, Visit&& visit);

// Quantized form of a whole tensor, for dumps and tests.
struct QuantizedTensor {
  std::vector<Code> codes;     // row-major like the input
  std::vector<double> values;  // dequantized, row-major
  std::vector<double> scales;  // decoded group scales in group order
  std::vector<Code> scale_codes;
  std::vector<double> zeros;   // affine only
  double tensor_scale = 1;
  std::uint64_t groups = 0, saturated_groups = 0, underflow_groups = 0, nan_groups = 0;
};

// rows x cols row-major data; axis: the reduction axis (1: blocks along a row,
// 0: down a column).
QuantizedTensor quantize_tensor(const ScaledFormat& f, std::span<const float> data, std::uint64_t rows,
                                std::uint64_t cols, int axis = 1);

// The per-tensor scale of a two-level format: amax / (element max * block-scale max),
// rounded to nearest in the tensor-scale format (1 when amax is 0).
double two_level_tensor_scale(const ScaledFormat& f, double tensor_amax);

namespace detail {
using GroupFn = void (*)(void* ctx, const GroupView& g);
void quantize_rows_impl(const ScaledFormat& f, const TensorPlan& plan, std::uint64_t row0, std::uint64_t nrows,
                        const float* data, void* ctx, GroupFn fn, bool raw);
}  // namespace detail

template <class Visit>
void quantize_rows(const ScaledFormat& f, const TensorPlan& plan, std::uint64_t row0, std::uint64_t nrows,
                   const float* data, Visit&& visit) {
  detail::quantize_rows_impl(
      f, plan, row0, nrows, data, &visit,
      [](void* ctx, const GroupView& g) { (*static_cast<std::remove_reference_t<Visit>*>(ctx))(g); }, false);
}

// Like quantize_rows, but the visitor gets each group's inputs and chosen scale
// only (codes and values null, clipped 0) and runs the element loop itself
// through view.quantizer (the scorer's fused loop).
template <class Visit>
void scan_rows(const ScaledFormat& f, const TensorPlan& plan, std::uint64_t row0, std::uint64_t nrows,
               const float* data, Visit&& visit) {
  detail::quantize_rows_impl(
      f, plan, row0, nrows, data, &visit,
      [](void* ctx, const GroupView& g) { (*static_cast<std::remove_reference_t<Visit>*>(ctx))(g); }, true);
}

// quantize_rows into dense outputs: the codes and dequantized values of rows row0 ..
// row0 + nrows - 1 at their inputs' positions (row-major from row0), and new_group(g)
// once for every group of the tensor over a whole pass of chunks in order. A
// tensor-wide (or fixed) scale comes with every row and a column's with every chunk: they
// are reported from the chunk at row 0 only, once.
template <class NewGroup>
void quantize_rows_dense(const ScaledFormat& f, const TensorPlan& plan, std::uint64_t row0, std::uint64_t nrows,
                         const float* data, Code* codes, double* values, NewGroup&& new_group) {
  const bool one_scale = f.granularity == Granularity::fixed || f.granularity == Granularity::tensor;
  const bool per_column = f.granularity == Granularity::col;
  quantize_rows(f, plan, row0, nrows, data, [&](const GroupView& g) {
    const std::size_t off = static_cast<std::size_t>(g.x - data);
    for (std::size_t i = 0; i < g.n; ++i) {
      codes[off + i * g.stride] = g.codes[i];
      values[off + i * g.stride] = g.values[i];
    }
    if ((one_scale && (row0 != 0 || g.x != data)) || (per_column && row0 != 0)) return;
    new_group(g);
  });
}

}  // namespace lobit
