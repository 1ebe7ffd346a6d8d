// lobit fit statistics: moments, the exact median and Laplace scale, channel spreads,
// outliers, non-finite values, the subsample, totals, thread independence, KS/AD against
// a direct Boost.Math computation, log-CDF tails, and recovery of known distributions.
#include <doctest/doctest.h>
#include <fmt/format.h>

#include <algorithm>
#include <bit>
#include <boost/math/distributions/laplace.hpp>
#include <boost/math/distributions/normal.hpp>
#include <boost/math/distributions/students_t.hpp>
#include <boost/math/special_functions/trigamma.hpp>
#include <boost/random/mersenne_twister.hpp>
#include <cmath>
#include <cstdint>
#include <limits>
#include <numeric>
#include <vector>

#include "lobit/error.hpp"
#include "lobit/measure/fit.hpp"

using namespace lobit;

namespace {

// Uniform on (0, 1) from the top 53 bits of a 64-bit Mersenne twister word.
struct Uniform {
  boost::random::mt19937_64 gen;
  explicit Uniform(std::uint64_t seed) : gen(seed) {}
  double operator()() { return (static_cast<double>(gen() >> 11) + 0.5) * 0x1p-53; }
};

// n draws by inversion of a Boost.Math distribution's quantile.
template <class Dist>
std::vector<float> draw(const Dist& d, std::size_t n, std::uint64_t seed, double loc = 0, double scale = 1) {
  Uniform u(seed);
  std::vector<float> v(n);
  for (auto& x : v) x = static_cast<float>(loc + scale * boost::math::quantile(d, u()));
  return v;
}

FitOptions options(int threads = 1) {
  FitOptions o;
  o.threads = threads;
  return o;
}

struct Direct {
  double mean, std, skew, kurt;
};
// Two passes in long double.
Direct direct_moments(const std::vector<double>& x) {
  long double s = 0;
  for (double v : x) s += v;
  const long double n = static_cast<long double>(x.size()), mean = s / n;
  long double m2 = 0, m3 = 0, m4 = 0;
  for (double v : x) {
    const long double d = v - mean;
    m2 += d * d, m3 += d * d * d, m4 += d * d * d * d;
  }
  m2 /= n, m3 /= n, m4 /= n;
  return {static_cast<double>(mean), static_cast<double>(std::sqrt(m2)), static_cast<double>(m3 / std::pow(m2, 1.5L)),
          static_cast<double>(m4 / (m2 * m2) - 3)};
}

std::vector<double> finite_of(const std::vector<float>& v) {
  std::vector<double> out;
  for (float x : v)
    if (std::isfinite(x)) out.push_back(x);
  return out;
}

// Median by std::nth_element: the mean of the two middle values for even n.
double nth_median(std::vector<double> v) {
  const std::size_t n = v.size(), h = n / 2;
  std::nth_element(v.begin(), v.begin() + static_cast<std::ptrdiff_t>(h), v.end());
  const double upper = v[h];
  if (n % 2) return upper;
  std::nth_element(v.begin(), v.begin() + static_cast<std::ptrdiff_t>(h - 1), v.end());
  return 0.5 * (v[h - 1] + upper);
}

double mean_abs_dev(const std::vector<double>& v, double m) {
  long double s = 0;
  for (double x : v) s += std::abs(static_cast<long double>(x) - m);
  return static_cast<double>(s / static_cast<long double>(v.size()));
}

bool rel_close(double a, double b, double tol) {
  if (a == b) return true;
  return std::abs(a - b) <= tol * std::max(std::abs(a), std::abs(b));
}

// IEEE 754 binary16 to binary32 (the layout from memory: 1 sign, 5 exponent bits with
// bias 15, 10 fraction bits; exponent 0 subnormal, 31 infinities and NaNs).
float half_to_float(std::uint16_t h) {
  const int sign = h >> 15, e = (h >> 10) & 31, f = h & 1023;
  double v;
  if (e == 0) v = std::ldexp(f, -24);
  else if (e == 31) v = f ? NAN : INFINITY;
  else v = std::ldexp(1024 + f, e - 25);
  return static_cast<float>(sign ? -v : v);
}

void check_same(const TensorStats& a, const TensorStats& b) {
  auto same = [](double x, double y) { return (std::isnan(x) && std::isnan(y)) || std::bit_cast<std::uint64_t>(x) == std::bit_cast<std::uint64_t>(y); };
  CHECK(a.count == b.count);
  CHECK(a.nan == b.nan);
  CHECK(a.infinite == b.infinite);
  CHECK(a.zeros == b.zeros);
  for (auto [x, y] : {std::pair{a.mean, b.mean}, {a.std, b.std}, {a.skewness, b.skewness},
                      {a.excess_kurtosis, b.excess_kurtosis}, {a.absmax, b.absmax}, {a.median, b.median},
                      {a.beyond_3sigma, b.beyond_3sigma}, {a.beyond_6sigma, b.beyond_6sigma},
                      {a.channel_absmax_spread, b.channel_absmax_spread}, {a.channel_std_spread, b.channel_std_spread}})
    CHECK(same(x, y));
  CHECK(a.best_fit == b.best_fit);
  REQUIRE(a.fits.size() == b.fits.size());
  for (std::size_t i = 0; i < a.fits.size(); ++i) {
    CHECK(same(a.fits[i].loc, b.fits[i].loc));
    CHECK(same(a.fits[i].scale, b.fits[i].scale));
    CHECK(same(a.fits[i].nu, b.fits[i].nu));
    CHECK(same(a.fits[i].ks, b.fits[i].ks));
    CHECK(same(a.fits[i].ad, b.fits[i].ad));
    CHECK(same(a.fits[i].log_likelihood, b.fits[i].log_likelihood));
  }
  REQUIRE(a.outliers.size() == b.outliers.size());
  for (std::size_t i = 0; i < a.outliers.size(); ++i) {
    CHECK(a.outliers[i].index == b.outliers[i].index);
    CHECK(a.outliers[i].source == b.outliers[i].source);
    CHECK(same(a.outliers[i].sigmas, b.outliers[i].sigmas));
  }
  CHECK(a.sample_size == b.sample_size);
}

}  // namespace

TEST_CASE("moments match a direct two-pass computation across many chunks") {
  // Exponential values shifted to 100: skewness 2 and excess kurtosis 6 in theory, and a
  // large mean against a unit spread, where one-pass sums lose digits.
  Uniform u(11);
  const std::size_t rows = 42857, cols = 7;
  std::vector<float> v(rows * cols);
  for (auto& x : v) x = static_cast<float>(100 - std::log(u()));
  v[5] = 0;
  v[9] = -0.0f;
  const MemorySource src(v, rows, cols, "exp");
  FitOptions o = options();
  o.chunk_elements = 1000;
  const TensorStats s = fit_source(src, o);
  const Direct d = direct_moments(finite_of(v));
  CHECK(s.count == v.size());
  CHECK(s.zeros == 2);
  CHECK(rel_close(s.mean, d.mean, 1e-13));
  CHECK(rel_close(s.std, d.std, 1e-12));
  CHECK(rel_close(s.skewness, d.skew, 1e-11));
  CHECK(rel_close(s.excess_kurtosis, d.kurt, 1e-11));
  const auto fin = finite_of(v);
  double amax = 0;
  for (double x : fin) amax = std::max(amax, std::abs(x));
  CHECK(s.absmax == amax);
  CHECK(s.crest == amax / s.std);
  std::uint64_t b3 = 0, b6 = 0;
  for (double x : fin) b3 += std::abs(x - s.mean) > 3 * s.std, b6 += std::abs(x - s.mean) > 6 * s.std;
  CHECK(s.beyond_3sigma_count == b3);
  CHECK(s.beyond_6sigma_count == b6);
  CHECK(b6 > 0);
}

TEST_CASE("median and Laplace scale are exact (against std::nth_element and a direct sum)") {
  struct Case {
    const char* name;
    std::vector<float> v;
  };
  std::vector<Case> cases;
  Uniform u(5);
  auto randoms = [&](std::size_t n, double scale) {
    std::vector<float> v(n);
    for (auto& x : v) x = static_cast<float>(scale * (u() - 0.3));
    return v;
  };
  cases.push_back({"one value", {3.5f}});
  cases.push_back({"two values, different buckets", {-1.0f, 1.0f}});
  cases.push_back({"odd", randoms(1001, 10)});
  cases.push_back({"even", randoms(100000, 1)});
  cases.push_back({"even, middles far apart", {-5, -4, -3, 1e-30f, 7, 8}});
  {
    std::vector<float> t;
    for (int i = 0; i < 5000; ++i) t.push_back(static_cast<float>(i % 7) - 3);
    cases.push_back({"ties", t});
  }
  cases.push_back({"all equal", std::vector<float>(777, -2.25f)});
  cases.push_back({"negative zeros", {-0.0f, 0.0f, -0.0f, -1.0f, 0.0f, 2.0f, -0.0f, -0.0f}});
  cases.push_back({"zeros of both signs, even", {-0.0f, 0.0f}});
  {
    std::vector<float> t;
    for (int i = 0; i < 3001; ++i) t.push_back(std::ldexp(static_cast<float>(i * 37 % 1001) - 500, -140));  // subnormal
    cases.push_back({"subnormals", t});
  }
  {
    std::vector<float> t;
    boost::random::mt19937_64 g(9);
    while (t.size() < 40000) {
      const float x = half_to_float(static_cast<std::uint16_t>(g()));
      if (std::isfinite(x)) t.push_back(x);
    }
    cases.push_back({"f16 bit patterns", t});
  }
  {
    std::vector<float> t = randoms(20001, 1);
    for (std::size_t i = 0; i < t.size(); i += 3)
      t[i] = std::bit_cast<float>(std::bit_cast<std::uint32_t>(t[i]) & 0xFFFF0000u);  // bf16-like
    cases.push_back({"bf16-like mixed", t});
  }
  for (const auto& c : cases) {
    CAPTURE(c.name);
    const MemorySource src(c.v, 1, c.v.size(), c.name);
    FitOptions o = options(2);
    o.chunk_elements = 256;
    const TensorStats s = fit_source(src, o);
    const auto fin = finite_of(c.v);
    const double med = nth_median(fin);
    CHECK(s.median == med);
    const DistributionFit* l = s.fit("laplace");
    if (s.std > 0) {
      REQUIRE(l);
      CHECK(l->loc == med);
      CHECK(rel_close(l->scale, mean_abs_dev(fin, med), 1e-13));
    } else {
      CHECK(s.fits.empty());
      CHECK(s.best_fit.empty());
    }
  }
}

TEST_CASE("a constant tensor has no fits; an empty or all-NaN one has no statistics") {
  const std::vector<float> v(100, 1.5f);
  const TensorStats s = fit_source(MemorySource(v, 10, 10), options());
  CHECK(s.std == 0);
  // 0.1 is not a short binary fraction: a sum-based mean would round, and the std with it.
  const std::vector<float> tenth(30000, 0.1f);
  FitOptions small = options(2);
  small.chunk_elements = 1000;
  for (const ChannelLayout& cl : {ChannelLayout{0, 1}, ChannelLayout{0, 0}}) {
    const TensorStats c = fit_source(MemorySource(tenth, 300, 100), small, cl);
    CHECK(c.std == 0);
    CHECK(c.mean == 0.1f);
    CHECK(c.median == 0.1f);
    CHECK(c.fits.empty());
    CHECK(c.channel_absmax_spread == 1);
    CHECK(std::isnan(c.channel_std_spread));  // 0 / 0: every channel is constant
  }
  CHECK(s.median == 1.5);
  CHECK(std::isnan(s.skewness));
  CHECK(s.fits.empty());
  CHECK(s.outliers.empty());
  const std::vector<float> nan(12, NAN);
  const TensorStats n = fit_source(MemorySource(nan, 3, 4), options());
  CHECK(n.count == 0);
  CHECK(n.nan == 12);
  CHECK(std::isnan(n.median));
  CHECK(std::isnan(n.mean));
  const std::vector<float> none;
  const TensorStats e = fit_source(MemorySource(none, 0, 5), options());
  CHECK(e.count == 0);
  CHECK(e.elements == 0);
}

TEST_CASE("NaN and Inf are counted and left out of every statistic") {
  Uniform u(3);
  std::vector<float> clean(30000);
  for (auto& x : clean) x = static_cast<float>(boost::math::quantile(boost::math::normal_distribution<>(), u()));
  std::vector<float> dirty = clean;
  dirty.insert(dirty.begin() + 17, NAN);
  dirty.insert(dirty.begin() + 1000, INFINITY);
  dirty.insert(dirty.begin() + 2000, -INFINITY);
  dirty.insert(dirty.begin() + 29000, NAN);
  FitOptions o = options();
  const TensorStats a = fit_source(MemorySource(clean, 1, clean.size()), o);
  const TensorStats b = fit_source(MemorySource(dirty, 1, dirty.size()), o);
  CHECK(b.nan == 2);
  CHECK(b.infinite == 2);
  CHECK(b.elements == clean.size() + 4);
  CHECK(b.count == a.count);
  CHECK(b.median == a.median);
  CHECK(b.absmax == a.absmax);
  CHECK(rel_close(b.mean, a.mean, 1e-12));
  CHECK(rel_close(b.std, a.std, 1e-12));
  CHECK(rel_close(b.excess_kurtosis, a.excess_kurtosis, 1e-10));
  CHECK(b.beyond_3sigma_count == a.beyond_3sigma_count);
  for (const auto& x : b.outliers) CHECK(std::isfinite(x.value));
  REQUIRE(b.fits.size() == 3);
  for (const auto& f : b.fits) {
    CHECK(std::isfinite(f.ks));
    CHECK(std::isfinite(f.ad));
  }
}

TEST_CASE("channel spreads on constructed matrices, rows and columns") {
  // Channel r (of 8) holds (r + 1) * pattern: absmax (r + 1) * 3, std (r + 1) * sd(pattern).
  const std::vector<float> pattern = {-3, -1, 0, 0.5f, 1, 2, -2, 2.5f, 1.5f, -0.5f};
  const std::size_t C = 8, L = pattern.size();
  std::vector<float> rows(C * L), cols(C * L);
  for (std::size_t r = 0; r < C; ++r)
    for (std::size_t k = 0; k < L; ++k) {
      rows[r * L + k] = static_cast<float>(r + 1) * pattern[k];
      cols[k * C + r] = static_cast<float>(r + 1) * pattern[k];
    }
  // max / median over {1..8}: 8 / 4.5.
  const double expect = 8 / 4.5;
  FitOptions o = options(2);
  o.chunk_elements = 3;  // channels cross chunk boundaries in the flat reading
  auto check = [&](const TensorStats& s) {
    CHECK(s.channels == C);
    CHECK(s.channels_measured);
    CHECK(rel_close(s.channel_absmax_spread, expect, 1e-15));
    CHECK(rel_close(s.channel_std_spread, expect, 1e-13));
  };
  check(fit_source(MemorySource(rows, C, L), o));                          // rows are channels
  check(fit_source(MemorySource(cols, L, C), o, ChannelLayout{0, 0}));     // columns are channels
  check(fit_source(MemorySource(rows, C * L, 1), o, ChannelLayout{L, 1}));  // read flat, channels of L
  check(fit_source(MemorySource(cols, L * C, 1), o, ChannelLayout{C, 0}));  // read flat, columns of C
  // A NaN in one channel leaves that channel's other values: channel 7 loses a zero, so
  // its absmax stays 24 and its std is that of the nine values left.
  std::vector<float> r2 = rows;
  r2[7 * L + 2] = NAN;
  const TensorStats sn = fit_source(MemorySource(r2, C, L), o);
  CHECK(rel_close(sn.channel_absmax_spread, expect, 1e-15));
  std::vector<double> rest;
  for (std::size_t k = 0; k < L; ++k)
    if (k != 2) rest.push_back(8.0 * pattern[k]);
  const double sd7 = direct_moments(rest).std, sd_unit = direct_moments({pattern.begin(), pattern.end()}).std;
  CHECK(rel_close(sn.channel_std_spread, sd7 / (4.5 * sd_unit), 1e-13));
  // Too many channels: not measured.
  FitOptions few = o;
  few.max_channels = 4;
  const TensorStats s = fit_source(MemorySource(rows, C, L), few);
  CHECK(!s.channels_measured);
  CHECK(std::isnan(s.channel_absmax_spread));
  CHECK_THROWS_AS(fit_source(MemorySource(rows, C, L), o, ChannelLayout{7, 1}), Error);
  CHECK_THROWS_AS(fit_source(MemorySource(rows, C, L), o, ChannelLayout{0, 2}), Error);
}

TEST_CASE("outliers: planted values, in order of |x - mean| / std, ties by index") {
  Uniform u(21);
  std::vector<float> v(100000);
  for (auto& x : v) x = static_cast<float>(boost::math::quantile(boost::math::normal_distribution<>(), u()));
  v[123] = 50, v[5000] = 50, v[77777] = -60, v[99999] = 40;
  FitOptions o = options(2);
  o.outliers = 5;
  o.chunk_elements = 4096;
  const TensorStats s = fit_source(MemorySource(v, 100, 1000, "planted"), o);
  REQUIRE(s.outliers.size() == 5);
  CHECK(s.outliers[0].index == 77777);
  CHECK(s.outliers[1].index == 123);
  CHECK(s.outliers[2].index == 5000);
  CHECK(s.outliers[3].index == 99999);
  CHECK(s.outliers[0].value == -60);
  CHECK(s.outliers[0].sigmas == (-60 - s.mean) / s.std);
  CHECK(s.outliers[0].tensor == "planted");
  // The fifth is the largest |x - mean| of the rest, found directly.
  std::size_t best = 0;
  double bd = -1;
  for (std::size_t i = 0; i < v.size(); ++i) {
    if (i == 123 || i == 5000 || i == 77777 || i == 99999) continue;
    const double d = std::abs(v[i] - s.mean);
    if (d > bd) bd = d, best = i;
  }
  CHECK(s.outliers[4].index == best);
  o.outliers = 0;
  CHECK(fit_source(MemorySource(v, 100, 1000), o).outliers.empty());
}

TEST_CASE("results do not depend on the thread count") {
  Uniform u(8);
  const boost::math::students_t_distribution<> t4(4);
  std::vector<float> v(300000);
  for (auto& x : v) x = static_cast<float>(boost::math::quantile(t4, u()));
  v[1234] = NAN;
  for (std::uint64_t sub : {std::uint64_t{1} << 20, std::uint64_t{4096}}) {
    CAPTURE(sub);
    FitOptions o = options(1);
    o.subsample = sub;
    o.chunk_elements = 5000;
    const MemorySource src(v, 600, 500, "t4");
    const TensorStats one = fit_source(src, o);
    o.threads = 2;
    const TensorStats two = fit_source(src, o);
    o.threads = 3;
    const TensorStats three = fit_source(src, o);
    check_same(one, two);
    check_same(one, three);
    CHECK(one.subsampled == (sub < v.size()));
    // Columns as channels too.
    o.threads = 1;
    const TensorStats c1 = fit_source(src, o, ChannelLayout{0, 0});
    o.threads = 2;
    check_same(c1, fit_source(src, o, ChannelLayout{0, 0}));
  }
}

TEST_CASE("the subsample is uniform without replacement, and seeded") {
  // Values 0 .. N-1 (exact in float32): the sample's mean and its KS distance to the
  // uniform law show whether the keys pick uniformly.
  const std::size_t N = 300000, m = 20000;
  std::vector<float> v(N);
  std::iota(v.begin(), v.end(), 0.0f);
  FitOptions o = options(2);
  o.subsample = m;
  const MemorySource src(v, 300, 1000, "ramp");
  const SourceFit f = fit_source_with_summary(src, o);
  const std::vector<double> xs = sample_values(*f.summary);
  REQUIRE(xs.size() == m);
  CHECK(f.stats.sample_size == m);
  CHECK(f.stats.subsampled);
  CHECK(std::adjacent_find(xs.begin(), xs.end()) == xs.end());  // no value twice
  // Mean of a simple random sample: SE = sigma / sqrt(m) * sqrt(1 - m / N) (finite
  // population correction; common practice), sigma^2 = (N^2 - 1) / 12.
  double mean = std::accumulate(xs.begin(), xs.end(), 0.0) / static_cast<double>(m);
  const double se = std::sqrt((static_cast<double>(N) * N - 1) / 12.0 / m * (1 - static_cast<double>(m) / N));
  CHECK(std::abs(mean - (N - 1) / 2.0) < 4.5 * se);
  // KS against the uniform on [0, N): below the asymptotic 0.1% point 1.95 / sqrt(m)
  // (Kolmogorov distribution; Marsaglia, Tsang and Wang, J. Stat. Software 8(18), 2003).
  double D = 0;
  for (std::size_t i = 0; i < m; ++i) {
    const double F = (xs[i] + 0.5) / static_cast<double>(N);
    D = std::max({D, (i + 1.0) / m - F, F - static_cast<double>(i) / m});
  }
  CHECK(D < 1.95 / std::sqrt(static_cast<double>(m)));
  // Same seed, same sample; another seed, another sample.
  const SourceFit again = fit_source_with_summary(src, o);
  CHECK(sample_values(*again.summary) == xs);
  o.seed = 2;
  const SourceFit other = fit_source_with_summary(src, o);
  CHECK(sample_values(*other.summary) != xs);
}

TEST_CASE("a total equals the fit of the concatenated data") {
  Uniform u(31);
  const boost::math::laplace_distribution<> lap(0, 1);
  std::vector<float> a(6000 * 10), b(2500 * 10), c(100 * 10);
  for (auto& x : a) x = static_cast<float>(boost::math::quantile(lap, u()));
  for (auto& x : b) x = static_cast<float>(0.5 + 2 * boost::math::quantile(lap, u()));
  for (auto& x : c) x = static_cast<float>(std::round(4 * u()) - 2);  // many ties
  b[77] = NAN;
  b[1234] = 80;
  std::vector<float> all = a;
  all.insert(all.end(), b.begin(), b.end());
  all.insert(all.end(), c.begin(), c.end());
  FitOptions o = options(2);
  o.chunk_elements = 2000;
  o.outliers = 6;
  const MemorySource sa(a, 6000, 10, "a"), sb(b, 2500, 10, "b"), sc(c, 100, 10, "c"), sall(all, 8600, 10, "all");
  const TensorStats whole = fit_source(sall, o);

  FitTotal total(o);
  total.add(sa, fit_source_with_summary(sa, o));
  // Two of them merged as a "file" total first.
  FitTotal file(o);
  file.add(sb, fit_source_with_summary(sb, o));
  file.add(sc, fit_source_with_summary(sc, o));
  total.merge(std::move(file));
  CHECK(total.sources() == 3);
  const TensorStats t = total.finish("total");
  CHECK(t.sources == 3);
  CHECK(t.count == whole.count);
  CHECK(t.nan == 1);
  CHECK(t.zeros == whole.zeros);
  CHECK(t.median == whole.median);
  CHECK(t.absmax == whole.absmax);
  CHECK(rel_close(t.mean, whole.mean, 1e-13));
  CHECK(rel_close(t.std, whole.std, 1e-13));
  CHECK(rel_close(t.skewness, whole.skewness, 1e-10));
  CHECK(rel_close(t.excess_kurtosis, whole.excess_kurtosis, 1e-11));
  CHECK(t.beyond_3sigma_count == whole.beyond_3sigma_count);
  CHECK(t.beyond_6sigma_count == whole.beyond_6sigma_count);
  CHECK(t.channels == whole.channels);
  CHECK(t.channel_absmax_spread == whole.channel_absmax_spread);
  CHECK(rel_close(t.channel_std_spread, whole.channel_std_spread, 1e-13));
  REQUIRE(t.fit("laplace"));
  CHECK(t.fit("laplace")->loc == whole.fit("laplace")->loc);
  CHECK(rel_close(t.fit("laplace")->scale, whole.fit("laplace")->scale, 1e-13));
  REQUIRE(t.outliers.size() == whole.outliers.size());
  const std::uint64_t base[] = {0, a.size(), a.size() + b.size()};
  for (std::size_t i = 0; i < t.outliers.size(); ++i) {
    CAPTURE(i);
    CHECK(base[t.outliers[i].source] + t.outliers[i].index == whole.outliers[i].index);
    CHECK(t.outliers[i].value == whole.outliers[i].value);
    CHECK(t.outliers[i].tensor == std::string(1, static_cast<char>('a' + t.outliers[i].source)));
  }
  CHECK(t.outliers[0].source == 1);
  CHECK(t.outliers[0].index == 1234);
  CHECK(t.sample_size == whole.count);  // fewer values than the subsample: all of them

  // A total of one source is that source.
  FitTotal one(o);
  one.add(sb, fit_source_with_summary(sb, o));
  const TensorStats ob = one.finish("b total");
  check_same(ob, fit_source(sb, o));
  CHECK(ob.name == "b total");
}

TEST_CASE("the total's sample is uniform over the union of its sources") {
  // Two sources of 200000 and 100000 values, a sample of 30000: the share drawn from the
  // first is binomial(30000, 2/3) up to the finite-population correction (common practice).
  std::vector<float> a(200000, 1.0f), b(100000, 2.0f);
  for (std::size_t i = 0; i < a.size(); i += 2) a[i] = 0;
  for (std::size_t i = 0; i < b.size(); i += 2) b[i] = 3;
  FitOptions o = options(2);
  o.subsample = 30000;
  const MemorySource sa(a, 200, 1000, "a"), sb(b, 100, 1000, "b");
  FitTotal t(o);
  t.add(sa, fit_source_with_summary(sa, o));
  t.add(sb, fit_source_with_summary(sb, o));
  const std::vector<double> xs = t.sample_values();
  REQUIRE(xs.size() == 30000);
  CHECK(t.finish().sample_size == 30000);
  const double from_a = static_cast<double>(std::count_if(xs.begin(), xs.end(), [](double x) { return x < 1.5; }));
  const double p = 2.0 / 3, m = 30000, N = 300000;
  const double se = std::sqrt(p * (1 - p) / m * (1 - m / N));
  CHECK(std::abs(from_a / m - p) < 4.5 * se);
}

TEST_CASE("KS and AD equal a direct computation from Boost.Math CDFs") {
  Uniform u(41);
  const boost::math::students_t_distribution<> t5(5);
  std::vector<float> v(5000);
  for (auto& x : v) x = static_cast<float>(0.25 + 0.5 * boost::math::quantile(t5, u()));
  for (std::size_t i = 0; i < v.size(); i += 4) v[i] = std::round(v[i] * 8) / 8;  // ties
  const TensorStats s = fit_source(MemorySource(v, 50, 100), options(2));
  REQUIRE(s.fits.size() == 3);
  CHECK(s.sample_size == v.size());
  std::vector<double> x = finite_of(v);
  std::sort(x.begin(), x.end());
  const std::size_t n = x.size();
  for (const auto& f : s.fits) {
    CAPTURE(f.family);
    std::vector<double> F(n), S(n);
    for (std::size_t i = 0; i < n; ++i) {
      if (f.family == "gauss") {
        const boost::math::normal_distribution<> d(f.loc, f.scale);
        F[i] = boost::math::cdf(d, x[i]), S[i] = boost::math::cdf(boost::math::complement(d, x[i]));
      } else if (f.family == "laplace") {
        const boost::math::laplace_distribution<> d(f.loc, f.scale);
        F[i] = boost::math::cdf(d, x[i]), S[i] = boost::math::cdf(boost::math::complement(d, x[i]));
      } else {
        const boost::math::students_t_distribution<> d(f.nu);
        const double z = (x[i] - f.loc) / f.scale;
        F[i] = boost::math::cdf(d, z), S[i] = boost::math::cdf(boost::math::complement(d, z));
      }
    }
    // D = max_i max(i/n - F(x_i), F(x_i) - (i-1)/n); A^2 = -n - (1/n) sum (2i-1)[ln F(x_i) +
    // ln(1 - F(x_{n+1-i}))] (Stephens 1974, eqs. for D and A^2; from memory).
    double D = 0;
    long double A = 0;
    for (std::size_t i = 1; i <= n; ++i) {
      D = std::max({D, static_cast<double>(i) / n - F[i - 1], F[i - 1] - static_cast<double>(i - 1) / n});
      A += (2.0L * i - 1) * (std::log(static_cast<long double>(F[i - 1])) + std::log(static_cast<long double>(S[n - i])));
    }
    const double A2 = static_cast<double>(-static_cast<long double>(n) - A / n);
    CHECK(rel_close(f.ks, D, 1e-12));
    CHECK(rel_close(f.ad, A2, 1e-12));
  }
}

TEST_CASE("log CDF tails: the series against Boost.Math where both are representable") {
  for (double z : {-20.0, -25.0, -30.0, -37.0}) {
    CAPTURE(z);
    const double ref = std::log(boost::math::cdf(boost::math::normal_distribution<>(), z));
    CHECK(rel_close(fit_detail::log_normal_lower_tail(z), ref, 1e-13));
  }
  for (double nu : {0.5, 1.0, 3.0, 30.0, 1000.0})
    for (double z : {-3.0, -30.0, -1e3, -1e6, -1e30}) {
      CAPTURE(nu);
      CAPTURE(z);
      const double F = boost::math::cdf(boost::math::students_t_distribution<>(nu), z);
      if (F < std::numeric_limits<double>::min()) continue;
      CHECK(rel_close(fit_detail::log_t_lower_tail(z, nu), std::log(F), 1e-12));
    }
  // Past underflow the model still gives finite logs: a 60-sigma value costs its real
  // share of A^2 rather than an infinity.
  const Model g{Family::gauss, 0, 1, 0};
  CHECK(g.cdf(-60) == 0);
  CHECK(rel_close(g.log_cdf(-60), -1800 - std::log(60.0) - 0.5 * std::log(2 * M_PI) + std::log1p(-1.0 / 3600), 1e-6));
  CHECK(g.log_ccdf(60) == g.log_cdf(-60));
  const Model t{Family::student_t, 0, 1, 1000};
  CHECK(std::isfinite(t.log_cdf(-1e4)));
  CHECK(t.log_cdf(-1e4) < t.log_cdf(-1e3));
  std::vector<double> x = {-1, -0.5, 0, 0.3, 0.7, 60};
  const EdfDistances e = edf_distances(x, g);
  CHECK(std::isfinite(e.ad));
  CHECK(e.ad > 300);  // ln(1 - F(60)) ~ -1804, weighted 1/n
}

TEST_CASE("known distributions are recognised and their parameters recovered") {
  const std::size_t n = std::size_t{1} << 17;
  const double dn = static_cast<double>(n);
  FitOptions o = options(2);
  SUBCASE("Gaussian") {
    const auto v = draw(boost::math::normal_distribution<>(), n, 101, 1.5, 2.0);
    const TensorStats s = fit_source(MemorySource(v, 128, 1024), o);
    CHECK(s.best_fit == "gauss");
    // Asymptotic standard errors: mean sigma / sqrt(n), std sigma / sqrt(2n) (common practice).
    CHECK(std::abs(s.mean - 1.5) < 4 * 2.0 / std::sqrt(dn));
    CHECK(std::abs(s.std - 2.0) < 4 * 2.0 / std::sqrt(2 * dn));
    CHECK(std::abs(s.excess_kurtosis) < 4 * std::sqrt(24 / dn));  // SE of g2: sqrt(24/n) (common practice)
  }
  SUBCASE("Laplace") {
    const auto v = draw(boost::math::laplace_distribution<>(0, 1), n, 102, -0.5, 0.75);
    const TensorStats s = fit_source(MemorySource(v, 128, 1024), o);
    CHECK(s.best_fit == "laplace");
    const DistributionFit* l = s.fit("laplace");
    // Median: variance 1 / (4 n f(loc)^2) = b^2 / n; mean |x - median|: variance b^2 / n
    // (|X - loc| is exponential with mean b) (common practice).
    CHECK(std::abs(l->loc + 0.5) < 4 * 0.75 / std::sqrt(dn));
    CHECK(std::abs(l->scale - 0.75) < 4 * 0.75 / std::sqrt(dn));
    CHECK(std::abs(s.excess_kurtosis - 3) < 0.5);  // Laplace: 3 (its SE is about sqrt(1000/n))
  }
  for (double nu : {3.0, 5.0}) {
    SUBCASE(fmt::format("Student-t nu={}", nu).c_str()) {
      const double loc = 0.2, sigma = 0.05;
      const auto v = draw(boost::math::students_t_distribution<>(nu), n, 103 + static_cast<int>(nu), loc, sigma);
      const TensorStats s = fit_source(MemorySource(v, 128, 1024), o);
      CHECK(s.best_fit == "student-t");
      const DistributionFit* t = s.fit("student-t");
      REQUIRE(t);
      CHECK(t->converged);
      // Standard errors from the inverse expected information (Lange, Little and Taylor,
      // JASA 84 (1989); from memory): I_mumu = (nu+1)/((nu+3) s^2), I_ss = 2 nu/((nu+3) s^2),
      // I_snu = -2/((nu+1)(nu+3) s), I_nunu = [psi'(nu/2) - psi'((nu+1)/2)]/4 - (nu+5)/(2 nu (nu+1)(nu+3)).
      const double imm = (nu + 1) / ((nu + 3) * sigma * sigma), iss = 2 * nu / ((nu + 3) * sigma * sigma);
      const double isn = -2 / ((nu + 1) * (nu + 3) * sigma);
      const double inn = 0.25 * (boost::math::trigamma(nu / 2) - boost::math::trigamma((nu + 1) / 2)) -
                         (nu + 5) / (2 * nu * (nu + 1) * (nu + 3));
      const double det = iss * inn - isn * isn;
      const double se_loc = std::sqrt(1 / (imm * dn)), se_sigma = std::sqrt(inn / det / dn),
                   se_nu = std::sqrt(iss / det / dn);
      CAPTURE(t->loc);
      CAPTURE(t->scale);
      CAPTURE(t->nu);
      CHECK(std::abs(t->loc - loc) < 4 * se_loc);
      CHECK(std::abs(t->scale - sigma) < 4 * se_sigma);
      CHECK(std::abs(t->nu - nu) < 4 * se_nu);
      // The fit is a maximum: every one-parameter nudge lowers the mean log-likelihood.
      const Model m = t->model();
      std::vector<double> xs = finite_of(v);
      auto ll = [&](const Model& mm) {
        long double a = 0;
        for (double x : xs) a += mm.log_pdf(x);
        return static_cast<double>(a / xs.size());
      };
      const double at = ll(m);
      CHECK(rel_close(at, t->log_likelihood, 1e-12));
      for (int p = 0; p < 3; ++p)
        for (double h : {-1e-3, 1e-3}) {
          Model mm = m;
          (p == 0 ? mm.loc : p == 1 ? mm.scale : mm.nu) *= 1 + h;
          if (p == 0) mm.loc = m.loc + h * m.scale;
          CHECK(ll(mm) < at);
        }
    }
  }
}

TEST_CASE("bad options are refused with a hint") {
  const std::vector<float> v(64, 1.0f);
  FitOptions o = options();
  o.subsample = 8;
  CHECK_THROWS_AS(fit_source(MemorySource(v, 8, 8), o), Error);
  o.subsample = (std::uint64_t{1} << 22) + 1;
  CHECK_THROWS_AS(fit_source(MemorySource(v, 8, 8), o), Error);
  o = options();
  o.outliers = -1;
  CHECK_THROWS_AS(fit_source(MemorySource(v, 8, 8), o), Error);
  try {
    fit_source(MemorySource(v, 8, 8, "w"), options(), ChannelLayout{5, 1});
    FAIL("no error");
  } catch (const Error& e) {
    CHECK(e.kind() == Error::Kind::usage);
    CHECK(e.where() == "w");
    CHECK(!e.hint().empty());
  }
}
