#pragma once
// Distribution statistics of a tensor (`lobit fit`): moments, exact median, maximum-
// likelihood fits of three families, their Kolmogorov-Smirnov and Anderson-Darling
// distances to the data, channel spreads and the largest outliers, for one source or
// for the total of several.
//
// Passes. A source is read twice in row chunks, whatever its size:
//   1. counts, moments (per chunk two-pass in binary64, merged in chunk order with the
//      pairwise update of Chan, Golub and LeVeque / Pebay), |x| maximum, per-channel
//      absmax and sigma, the N largest and N smallest values (with their indices),
//      and a histogram of the top 16 bits of the order-preserving key of each float32
//      (count and the sum of the low 16 bits per bucket);
//   2. the low-16-bit histogram inside the bucket(s) of the median (which makes the
//      median exact), the counts beyond 3 and 6 sigma, and the subsample.
// The total of several sources merges their pass-1 summaries (in the order added) and
// reads every source once more for its own median and sigma counts.
//
// Estimators (population forms, finite values only; NaN and +-Inf are counted apart):
//   mean, std = sqrt(m2), skewness = m3 / m2^1.5, excess kurtosis = m4 / m2^2 - 3, with
//   m_k = (1/n) sum (x - mean)^k. Median: the mean of the two middle values for even n.
//   Gaussian: mean and std (the MLE). Laplace: loc = median, scale = mean |x - median|
//   (the MLE; exact from the bucket sums and the median buckets' histogram, no third
//   pass). Both from every finite value. Student-t: location, scale and nu in [0.5, 1000]
//   by maximum likelihood on the subsample (Newton's method in (loc, ln scale, ln nu) with
//   an Armijo line search; the expected information of Lange, Little and Taylor (1989)
//   steers where the observed Hessian is not negative definite). A fit that collapses onto
//   a point mass (many equal values) is marked not converged and left out of best_fit.
// Channels: per-channel absmax and population std; spread = max / median over channels
//   with a finite value (median of two middles for even counts). A total's spread compares
//   channels across its sources, so it also shows scale differences between tensors.
// Distances (on the subsample, sorted, against each fitted model): KS D = sup |F_n - F|,
// AD A^2 = -n - (1/n) sum (2i - 1) [ln F(x_i) + ln(1 - F(x_{n+1-i}))]. They are distances,
// not tests: with millions of values every model would be rejected.
// best_fit: the highest Bayesian information criterion on the subsample,
//   n ln L-bar - (k / 2) ln n (k = 2, 2, 3 parameters), so that the Student-t, which holds
//   the Gaussian as nu -> inf, must earn its third parameter.
// Subsample: the `subsample` finite values with the smallest keys splitmix64(stream,
//   flat index) (a uniform sample without replacement; every value when there are fewer).
//   The total's sample is the same rule over the union (bottom-k samples merge exactly).
// Results do not depend on the thread count.
#include <cstdint>
#include <memory>
#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "lobit/measure/score.hpp"

namespace lobit {

struct FitOptions {
  std::uint64_t subsample = std::uint64_t{1} << 20;  // values for the t fit and KS/AD (16 .. 2^22)
  std::uint64_t seed = 1;
  int outliers = 10;                                 // top-N by |x - mean| / sigma (0 .. 100000)
  int threads = 0;                                   // 0: all cores
  std::uint64_t chunk_elements = std::uint64_t{1} << 18;  // whole source rows per chunk, about this many values
  std::uint64_t max_channels = std::uint64_t{1} << 20;    // more channels: channel spreads are not measured
  std::uint64_t max_total_channels = std::uint64_t{1} << 22;
};

// How the elements of a source (flat index f = row * cols + col) group into channels:
// the rows (axis 1) or the columns (axis 0) of a matrix with `cols` columns.
struct ChannelLayout {
  std::uint64_t cols = 0;  // 0: the source's own cols()
  int axis = 1;            // 1: a channel is a row (blocks run along rows); 0: a column
};

enum class Family { gauss, laplace, student_t };
std::string family_name(Family f);  // "gauss", "laplace", "student-t"

// A fitted model: CDF, log CDF and log density (Boost.Math distributions; the log CDF in
// the far tails, where the CDF underflows, from an asymptotic series of the same function).
struct Model {
  Family family = Family::gauss;
  double loc = 0, scale = 1, nu = 0;  // nu: Student-t only
  double cdf(double x) const;
  double log_cdf(double x) const;   // ln F(x)
  double log_ccdf(double x) const;  // ln (1 - F(x))
  double log_pdf(double x) const;
  int parameters() const { return family == Family::student_t ? 3 : 2; }
};

namespace fit_detail {
// ln Phi(z) for z <= -20 by the asymptotic series of the Mills ratio (Abramowitz and
// Stegun 26.2.12); Model uses it where Phi(z) underflows binary64 (z < -37.5).
double log_normal_lower_tail(double z);
// ln F(z) of the standard Student-t for z < 0 from F = I_w(nu/2, 1/2) / 2, w = nu / (nu + z^2),
// with I_w(a, b) = w^a (1 - w)^b / (a B(a, b)) 2F1(a + b, 1; a + 1; w) (DLMF 8.17.8);
// Model uses it where the CDF underflows.
double log_t_lower_tail(double z, double nu);
}  // namespace fit_detail

struct EdfDistances {
  double ks = 0, ad = 0;
};
// KS D and AD A^2 of sorted finite values against m (ties are handled: the EDF jumps by
// the multiplicity). Threads split fixed blocks; sums are added in block order.
EdfDistances edf_distances(std::span<const double> sorted, const Model& m, int threads = 1);

struct StudentTFit {
  double loc = 0, scale = 1, nu = 1;
  double log_likelihood = 0;  // mean ln density at the fit
  bool converged = false;
  int iterations = 0;
};
// Maximum likelihood of location, scale and nu in [0.5, 1000] on sorted finite values.
StudentTFit fit_student_t(std::span<const double> sorted, int threads = 1);

struct DistributionFit {
  std::string family;  // family_name
  double loc = 0, scale = 0;
  double nu = 0;                  // Student-t only (NaN otherwise)
  double log_likelihood = 0;      // mean ln density over the subsample at these parameters
  double ks = 0, ad = 0;          // on the subsample
  double bic = 0;                 // n ln L-bar - (k/2) ln n on the subsample
  bool converged = true;          // false: the Student-t fit did not settle (left out of best_fit)
  Model model() const;
};

struct Outlier {
  std::size_t source = 0;    // which source (0 for a single one; the order added for a total)
  std::string tensor;        // its name()
  std::uint64_t index = 0;   // flat storage index within that source
  double value = 0;
  double sigmas = 0;         // (value - mean) / std, signed
};

struct TensorStats {
  std::string name;
  std::uint64_t elements = 0;   // all, non-finite included
  std::uint64_t count = 0;      // finite values: every statistic is over these
  std::uint64_t nan = 0, infinite = 0;
  std::uint64_t zeros = 0;      // exact zeros (either sign)
  double mean = 0, std = 0, skewness = 0, excess_kurtosis = 0;
  double absmax = 0;            // max |x|
  double crest = 0;             // absmax / std
  double median = 0;
  std::uint64_t beyond_3sigma_count = 0, beyond_6sigma_count = 0;  // |x - mean| > k std
  double beyond_3sigma = 0, beyond_6sigma = 0, zero_fraction = 0;  // fractions of count
  std::vector<DistributionFit> fits;  // gauss, laplace, student-t; empty when the values do not vary
  std::string best_fit;               // family name, or empty
  std::uint64_t channels = 0;
  bool channels_measured = false;     // false: more than max_channels (spreads NaN)
  double channel_absmax_spread = 0;   // max / median over channels with a finite value
  double channel_std_spread = 0;
  std::vector<Outlier> outliers;      // by |x - mean| / std descending, then source, then index
  bool subsampled = false;            // the sample is smaller than count
  std::uint64_t sample_size = 0;
  std::uint64_t sources = 1;          // how many sources a total holds

  std::uint64_t nonfinite() const { return nan + infinite; }
  const DistributionFit* fit(std::string_view family) const;
};

// The mergeable part of one source's fit (what a total is made of). Moved, not shared.
struct FitSummary;
struct FitSummaryDeleter {
  void operator()(FitSummary* s) const;
};
using FitSummaryPtr = std::unique_ptr<FitSummary, FitSummaryDeleter>;

struct SourceFit {
  TensorStats stats;
  FitSummaryPtr summary;  // for FitTotal::add
};

// Fits one source (two passes). `stream` keys the subsample (callers hash a stable name
// so a tensor's sample does not depend on what else is selected). Throws lobit::Error
// (usage) for a layout that does not divide the source, and whatever fill_rows throws.
// No stream: name_stream(src.name()).
SourceFit fit_source_with_summary(const TensorSource& src, const FitOptions& opt, const ChannelLayout& layout = {},
                                  std::optional<std::uint64_t> stream = std::nullopt);
TensorStats fit_source(const TensorSource& src, const FitOptions& opt, const ChannelLayout& layout = {},
                       std::optional<std::uint64_t> stream = std::nullopt);

// The subsample a fit used (its values, sorted), e.g. to plot against the fitted models.
std::vector<double> sample_values(const FitSummary& s);

// 64-bit FNV-1a of a text: a stable stream number for a tensor name.
std::uint64_t name_stream(std::string_view text);

// The statistics of several sources together. Sources must stay alive (and give the same
// values) until finish(), which reads each once more. Totals merge into totals (a file's
// total into the run's), in the order added.
class FitTotal {
 public:
  explicit FitTotal(FitOptions opt);
  ~FitTotal();
  FitTotal(FitTotal&&) noexcept;
  FitTotal& operator=(FitTotal&&) noexcept;

  void add(const TensorSource& src, SourceFit fit);
  void merge(FitTotal&& other);
  std::uint64_t sources() const;
  // The total's subsample so far (sorted values).
  std::vector<double> sample_values() const;
  // One source: its own statistics (no extra pass). None: a TensorStats with count 0.
  TensorStats finish(const std::string& name = "total");

 private:
  struct State;
  std::unique_ptr<State> s_;
};

}  // namespace lobit
