#include "source_factory.hpp"

#include <charconv>
#include <fmt/format.h>

#include "lobit/error.hpp"
#include "lobit/source/synthetic.hpp"

namespace lobit::cli {

namespace {

class SyntheticTensor final : public TensorSource {
 public:
  explicit SyntheticTensor(SyntheticSource s) : s_(std::move(s)) {}
  std::uint64_t rows() const override { return s_.rows(); }
  std::uint64_t cols() const override { return s_.cols(); }
  void fill_rows(std::uint64_t row0, std::uint64_t nrows, float* out) const override {
    s_.fill(row0 * s_.cols(), std::span<float>(out, nrows * s_.cols()));
  }
  std::string name() const override { return canonical(s_.spec()); }
  std::optional<std::string> density() const override {
    switch (s_.spec().kind) {
      case SourceKind::gauss: return "gauss";
      case SourceKind::laplace: return "laplace";
      case SourceKind::uniform: return "uniform";
      default: return std::nullopt;
    }
  }

 private:
  SyntheticSource s_;
};

std::uint64_t parse_count(std::string_view t, const std::string& where) {
  std::uint64_t v = 0;
  auto [p, ec] = std::from_chars(t.data(), t.data() + t.size(), v);
  if (t.empty() || ec != std::errc() || p != t.data() + t.size() || v == 0)
    throw usage_error(fmt::format("'{}' is not a positive count", t), where, "write --shape ROWSxCOLS, e.g. 4096x1024");
  return v;
}

bool scalar_kind(SourceKind k) {
  return k == SourceKind::gauss || k == SourceKind::laplace || k == SourceKind::uniform ||
         k == SourceKind::logistic || k == SourceKind::student_t || k == SourceKind::outliers;
}

}  // namespace

std::unique_ptr<TensorSource> make_source(const std::string& text, std::uint64_t samples, std::uint64_t seed,
                                          const std::string& shape) {
  SourceSpec spec = parse_source(text);
  if (!shape.empty()) {
    const std::size_t x = shape.find('x');
    if (x == std::string::npos) throw usage_error(fmt::format("'{}' is not ROWSxCOLS", shape), "--shape", "write e.g. 4096x1024");
    spec.rows = parse_count(std::string_view(shape).substr(0, x), "--shape");
    spec.cols = parse_count(std::string_view(shape).substr(x + 1), "--shape");
  } else if (spec.rows == 0 && spec.cols == 0 && scalar_kind(spec.kind)) {
    // Scalar distributions: rows of 1024 where the count allows it.
    spec.cols = samples % 1024 == 0 ? 1024 : samples;
    spec.rows = samples / spec.cols;
  }
  return std::make_unique<SyntheticTensor>(SyntheticSource(spec, seed, samples));
}

}  // namespace lobit::cli
