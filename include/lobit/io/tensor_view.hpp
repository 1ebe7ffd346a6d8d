#pragma once
// A stored tensor as the 2-D matrix that scoring and quantization work on: the
// reduction axes folded into one side, the others into the other, in storage order
// so that every row is contiguous in the file.
#include <cstdint>
#include <string>
#include <vector>

#include "lobit/io/checkpoint.hpp"
#include "lobit/measure/score.hpp"

namespace lobit::io {

struct MatrixView {
  std::uint64_t rows = 1, cols = 1;  // storage-order matrix: element (r, c) is element r*cols + c
  int axis = 1;                      // 1: blocks run along rows; 0: down columns (ScoreOptions::axis)
  std::vector<int> reduce;           // the logical reduction axes used
  std::string text;                  // e.g. "axis 1 of [768, 3072]" or "axes 1-3 of [64, 32, 3, 3]"
  bool exact = true;                 // false: the requested axes are not contiguous in storage
                                     // and the nearest foldable set (`reduce`) was used instead
};

// Folds the tensor for the given logical reduction axes (sorted, in range). Axes that
// form a leading or trailing run in storage order fold exactly; otherwise the longest
// foldable run that keeps the innermost requested axis is used and `exact` is false.
MatrixView fold(const TensorInfo& t, const std::vector<int>& reduce);

// A checkpoint tensor as a scoring source (rows read on demand, converted to float32).
class StoredTensorSource final : public TensorSource {
 public:
  StoredTensorSource(const Checkpoint& ckpt, std::size_t index, MatrixView view);
  std::uint64_t rows() const override { return view_.rows; }
  std::uint64_t cols() const override { return view_.cols; }
  void fill_rows(std::uint64_t row0, std::uint64_t nrows, float* out) const override;
  std::string name() const override;
  const MatrixView& view() const { return view_; }

 private:
  const Checkpoint& ckpt_;
  std::size_t index_;
  MatrixView view_;
};

}  // namespace lobit::io
