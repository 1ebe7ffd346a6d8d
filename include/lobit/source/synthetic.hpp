#pragma once
// Seeded synthetic tensors: scalar distributions and weight-like matrices.
//
//   spec  := name ('+' key '=' value)*
//   name  := gauss | laplace | uniform | logistic | student-t | outliers | channel-scaled | llm
//
//   gauss, laplace, uniform, logistic   zero mean, unit variance
//   student-t+nu=N[+unit-variance=yes]  Student t with N > 0 degrees of freedom (nu is required);
//                                       unit-variance=yes scales by sqrt((N-2)/N), N > 2
//   outliers+fraction=F+size=S          N(0, 1) where each element independently (by its hash) is
//                                       replaced, with probability F, by +S or -S (F 0.001, S 20)
//   channel-scaled+spread=L             row r is N(0, sigma_r^2), sigma_r = exp(L z_r), z_r ~ N(0, 1)
//                                       from the row index (L 0.5; cols default 4096)
//   llm+spread=L+size=S+outliers=K[+nu=N]
//                                       a weight-like matrix, 4096 x 11008 by default: see below
//
// Every source takes `+rows=R+cols=C`, row-major. Scalar sources default to
// 1 x count (count from the caller); given one of rows/cols, the other is
// ceil(count / given). channel-scaled defaults to cols = 4096 and
// rows = ceil(count / cols).
//
// The llm model (an assumption, not fitted to any checkpoint):
//   x[r][c] = s_r * b[r][c], except at K planted positions.
//   s_r = exp(L z_r - L^2), z_r ~ N(0, 1) per row: log-normal per-output-channel scales,
//         normalised so that E[s_r^2] = 1; the bulk RMS is 1 (L default 0.3).
//   b   = N(0, 1), or with nu=N a Student t scaled to unit variance (N > 2), for a
//         slightly heavy-tailed bulk.
//   K planted outliers (default 8, "super weights"): K distinct positions, uniform
//         over the matrix by hashing; value +-S u with u uniform in [0.8, 1.2] and a
//         random sign, in units of the bulk RMS (S default 100).
//
// Randomness: rng::CounterRng (SplitMix64 on the element index), one stream per
// role (bulk, outlier choice, row scales, planted positions, planted values); an
// element's value depends only on (seed, spec, index), never on how the tensor is
// split into fill calls. The float overload returns exactly the double values
// rounded to nearest float. Values are identical on every platform (see
// random.hpp).
#include <cstdint>
#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <vector>

namespace lobit {

enum class SourceKind { gauss, laplace, uniform, logistic, student_t, outliers, channel_scaled, llm };

struct SourceSpec {
  SourceKind kind = SourceKind::gauss;
  std::uint64_t rows = 0;            // 0: not given (resolved from the caller's count)
  std::uint64_t cols = 0;            // 0: not given
  double nu = 0;                     // student-t: degrees of freedom; llm: t bulk (0 = Gaussian bulk)
  bool unit_variance = false;        // student-t
  double fraction = 0;               // outliers: probability of an outlier per element
  double size = 0;                   // outliers, llm: outlier magnitude (in standard deviations)
  double spread = 0;                 // channel-scaled, llm: sigma of ln(row scale)
  std::uint64_t outlier_count = 0;   // llm: planted outliers
  bool operator==(const SourceSpec&) const = default;
};

// The family defaults (what parse_source fills in before the keys).
SourceSpec default_source(SourceKind kind);

// Parses a source spec. Throws lobit::Error (usage) with a hint on bad input.
SourceSpec parse_source(std::string_view text);

// The spec text with every family parameter written out, rows/cols when set;
// parse_source reads it back to the same SourceSpec.
std::string canonical(const SourceSpec& spec);

// Throws lobit::Error (usage) if a parameter is out of its domain.
void validate(const SourceSpec& spec);

std::string_view source_name(SourceKind kind);
const std::vector<std::string_view>& source_names();

// One planted outlier of an llm source: flat row-major index and value.
struct PlantedOutlier {
  std::uint64_t index;
  double value;
  bool operator==(const PlantedOutlier&) const = default;
};

class SyntheticSource {
 public:
  // default_count sets the shape where the spec leaves it open (see above).
  SyntheticSource(const SourceSpec& spec, std::uint64_t seed, std::uint64_t default_count = 0);
  SyntheticSource(std::string_view spec, std::uint64_t seed, std::uint64_t default_count = 0);

  const SourceSpec& spec() const noexcept { return spec_; }  // rows and cols resolved
  std::uint64_t seed() const noexcept { return seed_; }
  std::uint64_t rows() const noexcept { return spec_.rows; }
  std::uint64_t cols() const noexcept { return spec_.cols; }
  std::uint64_t size() const noexcept { return spec_.rows * spec_.cols; }

  // Elements first .. first + out.size() - 1 in row-major order. Throws
  // lobit::Error (usage) past size().
  void fill(std::uint64_t first, std::span<float> out) const;
  void fill(std::uint64_t first, std::span<double> out) const;
  std::vector<float> values(std::uint64_t first, std::size_t count) const;

  // One line: the spec, the model, the shape and the seed.
  std::string describe() const;

  // Theoretical variance of the marginal (one element at a uniformly random
  // position): gauss, laplace, uniform, logistic 1; student-t nu/(nu-2) (1 with
  // unit-variance, +inf for 1 < nu <= 2, none for nu <= 1); outliers
  // (1 - F) + F S^2; channel-scaled exp(2 L^2); llm ((n - K) + sum of the planted
  // values squared) / n, the expectation over the row scales.
  std::optional<double> variance() const;

  // The marginal CDF (Boost.Math) for gauss, laplace, uniform, logistic,
  // student-t and outliers (the Gaussian and two atoms mixture); none for the
  // matrix sources, whose marginal is a scale mixture.
  std::optional<double> cdf(double x) const;

  // The standard-deviation multiplier of a row: s_r for channel-scaled and llm,
  // 1 for the others.
  double row_scale(std::uint64_t row) const;

  // llm: the planted outliers, sorted by index; empty for the others.
  std::span<const PlantedOutlier> planted_outliers() const noexcept { return planted_; }

 private:
  template <class T>
  void fill_impl(std::uint64_t first, std::span<T> out) const;

  SourceSpec spec_;
  std::uint64_t seed_;
  std::uint64_t key_bulk_, key_select_, key_rows_;
  std::vector<PlantedOutlier> planted_;
};

}  // namespace lobit
