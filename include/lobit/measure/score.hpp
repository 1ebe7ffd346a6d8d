#pragma once
// Scoring: many scaled formats over one source in one streaming pass (plus the
// pre-pass that per-tensor scales, column scales, double quantization and the
// top-magnitude threshold need). Results do not depend on the thread count.
#include <functional>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "lobit/measure/metrics.hpp"
#include "lobit/scale/scaled_format.hpp"

namespace lobit {

// A 2-D source read in row chunks. fill_rows must be safe to call from several
// threads at once and give the same values for the same rows every time.
class TensorSource {
 public:
  virtual ~TensorSource() = default;
  virtual std::uint64_t rows() const = 0;
  virtual std::uint64_t cols() const = 0;
  virtual void fill_rows(std::uint64_t row0, std::uint64_t nrows, float* out) const = 0;
  virtual std::string name() const = 0;
  // Rows already in memory, row-major from row0 on (no copy); null: use fill_rows.
  virtual const float* view_rows(std::uint64_t row0) const {
    (void)row0;
    return nullptr;
  }
  // The unit-variance density of every element, where one exists ("gauss",
  // "laplace", "uniform"): the exact closed-form error applies to it.
  virtual std::optional<std::string> density() const { return std::nullopt; }
};

// Rows x cols values already in memory (not copied: the span must outlive the source).
class MemorySource final : public TensorSource {
 public:
  MemorySource(std::span<const float> data, std::uint64_t rows, std::uint64_t cols, std::string name = "memory");
  std::uint64_t rows() const override { return rows_; }
  std::uint64_t cols() const override { return cols_; }
  void fill_rows(std::uint64_t row0, std::uint64_t nrows, float* out) const override;
  std::string name() const override { return name_; }
  const float* view_rows(std::uint64_t row0) const override { return data_.data() + row0 * cols_; }

 private:
  std::span<const float> data_;
  std::uint64_t rows_, cols_;
  std::string name_;
};

struct ScoreOptions {
  int threads = 0;                         // 0: all cores
  int axis = 1;                            // reduction axis: 1 along rows, 0 down columns
  std::uint64_t chunk_elements = 1 << 18;  // rows per chunk ~ this many elements (whole rows)
  double top_fraction = 1e-4;              // "largest 0.01% of magnitudes"
  bool unfused = false;                    // tests: take the general per-group path everywhere
  // Called now and then from one thread with (chunks done, chunks in all), for a progress line.
  std::function<void(std::uint64_t, std::uint64_t)> progress;
};

struct ScoreRow {
  std::string format;            // canonical spec
  double bits_per_element = 0;   // exact for this shape, scales included
  double scale_bit_share = 0;    // share of the bits spent on scales and zero points
  ErrorReport report;
  double top_threshold = 0;      // |x| at or above this counts as a top magnitude
  bool ragged = false;           // the last block along the axis is shorter than the block size
  ErrorSums sums;                // what the report was made from (merge these to total several sources)
  std::vector<std::uint64_t> histogram;  // element code usage
};

struct ScoreResult {
  std::vector<ScoreRow> rows;    // in the order the formats were given
  std::uint64_t elements = 0;
  int threads = 1;
  std::uint64_t chunks = 0;
  double top_threshold = 0;
};

ScoreResult score(const std::vector<std::shared_ptr<const ScaledFormat>>& formats, const TensorSource& source,
                  const ScoreOptions& options = {});

}  // namespace lobit
