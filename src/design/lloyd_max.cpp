#include "lobit/design/lloyd_max.hpp"

#include <algorithm>
#include <bit>
#include <boost/math/distributions/normal.hpp>
#include <cmath>
#include <fmt/format.h>
#include <limits>
#include <string>

#include "lobit/error.hpp"
#include "lobit/format/value_table.hpp"

namespace lobit {

namespace {

using LD = long double;
constexpr LD kSqrt2 = 1.41421356237309504880168872420969808L;
constexpr LD kSqrt3 = 1.73205080756887729352744634150587237L;
constexpr LD kInvSqrt2 = 0.707106781186547524400844362104849039L;
constexpr LD kInvSqrt2Pi = 0.398942280401432677939946059934381868L;
constexpr LD kInf = std::numeric_limits<LD>::infinity();

constexpr int kMaxLevels = 65536;

void check_levels(int levels, int min_levels, const std::string& where) {
  if (levels < min_levels || levels > kMaxLevels)
    throw usage_error(fmt::format("levels={} is out of range", levels), where,
                      fmt::format("use {} to {} levels", min_levels, kMaxLevels));
}

// ---------------------------------------------------------------------------
// Partial moments of the unit-variance densities in long double.
//  Gaussian: P(a<X<b) from upper tails Q(u) = erfc(u/sqrt2)/2 on the cell's
//            own side (no difference of CDFs near 1), and
//            int_a^b x phi = phi(a) - phi(b).
//  Laplace:  p(x) = exp(-sqrt2 |x|)/sqrt2, upper tail I0(u) = exp(-sqrt2 u)/2,
//            int_u^inf t p = I1(u) = (u + 1/sqrt2) exp(-sqrt2 u)/2, and by
//            symmetry int_a^b x p = I1(|a|) - I1(|b|) for every cell.
//  Uniform:  p = 1/(2 sqrt3) on [-sqrt3, sqrt3], the cell clipped to it.

LD tail(Density d, LD u) {  // P(X > u), u >= 0 (or +inf)
  if (std::isinf(u)) return 0;
  return d == Density::gauss ? 0.5L * std::erfc(u * kInvSqrt2) : 0.5L * std::exp(-kSqrt2 * u);
}

LD first_tail(Density d, LD u) {  // int_u^inf t p(t) dt, u >= 0 (or +inf)
  if (std::isinf(u)) return 0;
  return d == Density::gauss ? kInvSqrt2Pi * std::exp(-0.5L * u * u) : 0.5L * (u + kInvSqrt2) * std::exp(-kSqrt2 * u);
}

LD pdf(Density d, LD x) {
  if (std::isinf(x)) return 0;
  switch (d) {
    case Density::gauss: return kInvSqrt2Pi * std::exp(-0.5L * x * x);
    case Density::laplace: return kInvSqrt2 * std::exp(-kSqrt2 * std::fabs(x));
    case Density::uniform: return std::fabs(x) <= kSqrt3 ? 1 / (2 * kSqrt3) : 0;
  }
  return 0;
}

struct Cell {
  LD m0 = 0, m1 = 0;
};

Cell cell_moments(Density d, LD a, LD b) {
  Cell c;
  if (d == Density::uniform) {
    const LD lo = std::max(a, -kSqrt3), hi = std::min(b, kSqrt3);
    if (!(lo < hi)) return c;
    c.m0 = (hi - lo) / (2 * kSqrt3);
    c.m1 = (hi - lo) * (hi + lo) / (4 * kSqrt3);
    return c;
  }
  const LD ua = std::fabs(a), ub = std::fabs(b);
  if (a >= 0) c.m0 = tail(d, ua) - tail(d, ub);
  else if (b <= 0) c.m0 = tail(d, ub) - tail(d, ua);
  else c.m0 = 1 - tail(d, ua) - tail(d, ub);
  c.m1 = first_tail(d, ua) - first_tail(d, ub);
  return c;
}

// Thresholds t (N-1 of them, cell j = [t[j-1], t[j]], t[-1] = -inf,
// t[N-1] = +inf) and what one Newton step needs.
struct State {
  std::vector<LD> c;                // centroids
  std::vector<LD> da, db;           // dc_j/da, dc_j/db
  std::vector<LD> F;                // t_i - (c_i + c_{i+1})/2
  LD norm = 0;                      // max |F_i|
  bool valid = true;                // every cell has mass and the thresholds increase
};

State evaluate(Density d, const std::vector<LD>& t) {
  const std::size_t n = t.size() + 1;
  State s;
  s.c.resize(n);
  s.da.resize(n);
  s.db.resize(n);
  for (std::size_t i = 1; i < t.size(); ++i)
    if (!(t[i - 1] < t[i])) s.valid = false;
  if (!s.valid) return s;
  for (std::size_t j = 0; j < n; ++j) {
    const LD a = j == 0 ? -kInf : t[j - 1], b = j + 1 == n ? kInf : t[j];
    const Cell m = cell_moments(d, a, b);
    if (!(m.m0 > 0)) {
      s.valid = false;
      return s;
    }
    const LD c = m.m1 / m.m0;
    s.c[j] = c;
    // d/da (M1/M0) = p(a)(c - a)/M0, d/db (M1/M0) = p(b)(b - c)/M0.
    s.da[j] = std::isinf(a) ? 0 : pdf(d, a) * (c - a) / m.m0;
    s.db[j] = std::isinf(b) ? 0 : pdf(d, b) * (b - c) / m.m0;
  }
  s.F.resize(t.size());
  s.norm = 0;
  for (std::size_t i = 0; i < t.size(); ++i) {
    s.F[i] = t[i] - (s.c[i] + s.c[i + 1]) / 2;
    s.norm = std::max(s.norm, std::fabs(s.F[i]));
  }
  return s;
}

// The densities are symmetric: keep the thresholds exactly so.
void symmetrize(std::vector<LD>& t) {
  const std::size_t m = t.size();
  for (std::size_t i = 0; i < m / 2; ++i) {
    const LD v = (t[m - 1 - i] - t[i]) / 2;
    t[i] = -v;
    t[m - 1 - i] = v;
  }
  if (m % 2 == 1) t[m / 2] = 0;
}

// Newton's step on F(t) = 0: J = I - (Jacobian of the midpoint-of-centroids
// map), tridiagonal, solved by the Thomas algorithm.
std::vector<LD> newton_step(const State& s) {
  const std::size_t m = s.F.size();
  std::vector<LD> diag(m), lower(m), upper(m), rhs(m);
  for (std::size_t i = 0; i < m; ++i) {
    diag[i] = 1 - (s.db[i] + s.da[i + 1]) / 2;
    lower[i] = i > 0 ? -s.da[i] / 2 : 0;            // dF_i/dt_{i-1}
    upper[i] = i + 1 < m ? -s.db[i + 1] / 2 : 0;    // dF_i/dt_{i+1}
    rhs[i] = -s.F[i];
  }
  for (std::size_t i = 1; i < m; ++i) {
    const LD w = lower[i] / diag[i - 1];
    diag[i] -= w * upper[i - 1];
    rhs[i] -= w * rhs[i - 1];
  }
  std::vector<LD> x(m);
  for (std::size_t i = m; i-- > 0;) x[i] = (rhs[i] - (i + 1 < m ? upper[i] * x[i + 1] : 0)) / diag[i];
  return x;
}

// The Panter-Dite companding start: thresholds at the quantiles (i+1)/N of the
// density proportional to p^(1/3) (Gaussian: N(0, 3); Laplace: b = 3/sqrt2;
// uniform: itself).
std::vector<LD> companding_start(Density d, int levels) {
  std::vector<LD> t(static_cast<std::size_t>(levels - 1));
  const boost::math::normal_distribution<LD> normal;
  for (int i = 0; i + 1 < levels; ++i) {
    const LD q = static_cast<LD>(i + 1) / levels;
    LD x = 0;
    switch (d) {
      case Density::gauss: x = kSqrt3 * boost::math::quantile(normal, q); break;
      case Density::laplace: {
        const LD b = 3 * kInvSqrt2;
        x = q < 0.5L ? b * std::log(2 * q) : -b * std::log(2 * (1 - q));
        break;
      }
      case Density::uniform: x = -kSqrt3 + 2 * kSqrt3 * q; break;
    }
    t[static_cast<std::size_t>(i)] = x;
  }
  symmetrize(t);
  return t;
}

std::vector<double> to_double(const std::vector<LD>& v) {
  std::vector<double> out(v.size());
  for (std::size_t i = 0; i < v.size(); ++i) out[i] = static_cast<double>(v[i]);
  return out;
}

std::vector<double> midpoints(const std::vector<double>& levels) {
  std::vector<double> t;
  for (std::size_t i = 0; i + 1 < levels.size(); ++i) t.push_back(midpoint(levels[i], levels[i + 1]).nearest);
  return t;
}

// ---------------------------------------------------------------------------
// Compensated sums for the data versions.
struct Sum {
  LD s = 0, c = 0;
  void add(LD x) {
    const LD t = s + x;
    if (std::fabs(s) >= std::fabs(x)) c += (s - t) + x;
    else c += (x - t) + s;
    s = t;
  }
  LD value() const { return s + c; }
};

std::vector<double> sorted_data(std::span<const double> data, int levels, const std::string& where) {
  check_levels(levels, 1, where);
  std::vector<double> x(data.begin(), data.end());
  for (double& v : x) {
    if (!std::isfinite(v)) throw usage_error("data must be finite", where, "filter inf and NaN values first");
    if (v == 0) v = 0.0;
  }
  std::sort(x.begin(), x.end());
  std::size_t distinct = x.empty() ? 0 : 1;
  for (std::size_t i = 1; i < x.size(); ++i) distinct += x[i] != x[i - 1] ? 1 : 0;
  if (distinct < static_cast<std::size_t>(levels))
    throw usage_error(fmt::format("{} levels need at least {} distinct values, the data has {}", levels, levels,
                                  distinct),
                      where, "use fewer levels or more data");
  return x;
}

double mean_of(const std::vector<double>& x, std::size_t lo, std::size_t hi) {
  Sum s;
  for (std::size_t i = lo; i < hi; ++i) s.add(x[i]);
  return static_cast<double>(s.value() / static_cast<LD>(hi - lo));
}

// Mean squared error of assigning each x to the level of its segment.
double segment_mse(const std::vector<double>& x, const std::vector<std::size_t>& bounds,
                   const std::vector<double>& levels) {
  Sum s;
  for (std::size_t j = 0; j < levels.size(); ++j)
    for (std::size_t i = bounds[j]; i < bounds[j + 1]; ++i) {
      const LD e = static_cast<LD>(x[i]) - levels[j];
      s.add(e * e);
    }
  return static_cast<double>(s.value() / static_cast<LD>(x.size()));
}

// with_mse = false skips the 50-digit MSE (seconds for 65536 levels) where
// only the levels are wanted.
LloydMaxResult solve_lloyd_max(Density d, int levels, double tolerance, int max_iterations, bool with_mse) {
  const std::string where = fmt::format("lloyd_max {} levels={}", to_string(d), levels);
  check_levels(levels, 1, where);
  if (!(tolerance > 0)) throw usage_error("tolerance must be positive", where, "the default is 1e-13");
  if (max_iterations < 0) throw usage_error("max_iterations must be >= 0", where, "give a non-negative iteration cap");
  LloydMaxResult r;
  if (levels == 1) {
    r.levels = {0.0};
    r.mse = exact_mse_levels(r.levels, d, 1.0).mse;
    r.converged = true;
    return r;
  }
  std::vector<LD> t = companding_start(d, levels);
  State s = evaluate(d, t);
  if (!s.valid) throw Error(Error::Kind::internal, "the companding start has an empty cell", where);
  int stalls = 0;
  const LD target = static_cast<LD>(tolerance) * 1e-3L;
  while (r.iterations < max_iterations && s.norm > target) {
    ++r.iterations;
    const std::vector<LD> step = newton_step(s);
    bool accepted = false;
    for (LD alpha = 1; alpha > 1e-6L; alpha /= 2) {
      std::vector<LD> trial(t.size());
      for (std::size_t i = 0; i < t.size(); ++i) trial[i] = t[i] + alpha * step[i];
      symmetrize(trial);
      State ts = evaluate(d, trial);
      if (ts.valid && ts.norm < s.norm) {
        t = std::move(trial);
        s = std::move(ts);
        accepted = true;
        break;
      }
    }
    // At the rounding floor (already within tolerance) no step makes
    // progress any more: stop there.
    if (!accepted && s.norm <= static_cast<LD>(tolerance)) break;
    if (!accepted) {
      // A plain Lloyd step (thresholds to the midpoints of the centroids)
      // never increases the MSE and keeps the thresholds ordered.
      std::vector<LD> trial(t.size());
      for (std::size_t i = 0; i < t.size(); ++i) trial[i] = (s.c[i] + s.c[i + 1]) / 2;
      symmetrize(trial);
      State ts = evaluate(d, trial);
      if (!ts.valid) break;
      const bool progress = ts.norm < s.norm;
      t = std::move(trial);
      s = std::move(ts);
      // At the rounding floor neither step makes progress: stop there.
      if (!progress && ++stalls >= 3) break;
      if (progress) stalls = 0;
    }
  }
  // Converged: one Lloyd step from here moves nothing by more than tolerance.
  std::vector<LD> c = s.c;
  std::vector<LD> t2(t.size());
  for (std::size_t i = 0; i < t.size(); ++i) t2[i] = (c[i] + c[i + 1]) / 2;
  symmetrize(t2);
  const State s2 = evaluate(d, t2);
  LD move = 0;
  if (s2.valid) {
    for (std::size_t i = 0; i < t.size(); ++i) move = std::max(move, std::fabs(t2[i] - t[i]));
    for (std::size_t j = 0; j < c.size(); ++j) move = std::max(move, std::fabs(s2.c[j] - c[j]));
  }
  r.converged = s2.valid && move <= static_cast<LD>(tolerance);
  // Symmetric levels, the middle one exactly 0 for odd N.
  const std::size_t n = c.size();
  for (std::size_t j = 0; j < n / 2; ++j) {
    const LD v = (c[n - 1 - j] - c[j]) / 2;
    c[j] = -v;
    c[n - 1 - j] = v;
  }
  if (n % 2 == 1) c[n / 2] = 0;
  r.levels = to_double(c);
  for (std::size_t j = 1; j < n; ++j)
    if (!(r.levels[j - 1] < r.levels[j]))
      throw Error(Error::Kind::internal, "Lloyd-Max levels are not distinct in binary64", where,
                  "use fewer levels");
  r.thresholds = midpoints(r.levels);
  if (with_mse) r.mse = exact_mse_levels(r.levels, d, 1.0).mse;
  return r;
}
}  // namespace

LloydMaxResult lloyd_max(Density d, int levels, double tolerance, int max_iterations) {
  return solve_lloyd_max(d, levels, tolerance, max_iterations, true);
}

UniformOptimum optimal_uniform(Density d, int levels) {
  const std::string where = fmt::format("optimal_uniform {} levels={}", to_string(d), levels);
  check_levels(levels, 2, where);
  std::vector<double> grid(static_cast<std::size_t>(levels));
  for (int i = 0; i < levels; ++i) grid[static_cast<std::size_t>(i)] = i - (levels - 1) / 2.0;  // exact half-integers
  const OptimalScale o = optimal_scale_levels(grid, d);
  UniformOptimum u;
  u.step = o.scale;
  u.mse = o.error.mse;
  u.levels.resize(grid.size());
  for (std::size_t i = 0; i < grid.size(); ++i) u.levels[i] = grid[i] * o.scale;
  return u;
}

LloydMaxResult lloyd_data(std::span<const double> data, int levels, int max_iterations) {
  const std::string where = fmt::format("lloyd_data levels={}", levels);
  if (max_iterations < 0) throw usage_error("max_iterations must be >= 0", where, "give a non-negative iteration cap");
  const std::vector<double> x = sorted_data(data, levels, where);
  const std::size_t n = x.size(), k = static_cast<std::size_t>(levels);
  // Start: contiguous groups of distinct values with nearly equal counts.
  std::vector<std::size_t> bounds(k + 1, 0);
  {
    std::size_t g = 0, i = 0;
    // Distinct values left from position i onwards.
    std::vector<std::size_t> distinct_after(n + 1, 0);
    for (std::size_t p = n; p-- > 0;)
      distinct_after[p] = distinct_after[p + 1] + ((p + 1 == n || x[p] != x[p + 1]) ? 1 : 0);
    while (g + 1 < k) {
      // Take at least one distinct value, then more while under the target
      // count and while enough distinct values remain for the other groups.
      const std::size_t target = (g + 1) * n / k;
      do {
        const double v = x[i];
        while (i < n && x[i] == v) ++i;
      } while (i < target && distinct_after[i] > k - g - 1 && i < n);
      bounds[++g] = i;
    }
    bounds[k] = n;
  }
  std::vector<double> lv(k);
  for (std::size_t j = 0; j < k; ++j) lv[j] = mean_of(x, bounds[j], bounds[j + 1]);
  LloydMaxResult r;
  std::vector<std::size_t> nb(k + 1);
  while (r.iterations < max_iterations) {
    nb[0] = 0;
    nb[k] = n;
    for (std::size_t j = 0; j + 1 < k; ++j) {
      const Threshold th = midpoint(lv[j], lv[j + 1]);
      // First point strictly above the exact midpoint (a point on it stays low).
      nb[j + 1] = static_cast<std::size_t>(
          std::partition_point(x.begin(), x.end(), [&](double v) { return th.compare(v) <= 0; }) - x.begin());
    }
    if (nb == bounds) {
      r.converged = true;
      break;
    }
    ++r.iterations;
    bounds = nb;
    for (std::size_t j = 0; j < k; ++j)
      if (bounds[j + 1] > bounds[j]) lv[j] = mean_of(x, bounds[j], bounds[j + 1]);  // an empty cell keeps its level
  }
  r.levels = lv;
  r.thresholds = midpoints(lv);
  r.mse = segment_mse(x, bounds, lv);
  return r;
}

LloydMaxResult kmeans_1d_exact(std::span<const double> data, int levels) {
  const std::string where = fmt::format("kmeans_1d_exact levels={}", levels);
  const std::vector<double> x = sorted_data(data, levels, where);
  const std::size_t n = x.size(), k = static_cast<std::size_t>(levels);
  if (static_cast<double>(n) * static_cast<double>(k) > static_cast<double>(std::size_t{1} << 26))
    throw usage_error(fmt::format("{} points x {} levels is beyond the 2^26 split table", n, k), where,
                      "subsample the data or use lloyd_data");
  // Prefix sums of the data centred on its median (compensated, long double).
  const LD mu = x[n / 2];
  std::vector<LD> s1(n + 1, 0), s2(n + 1, 0);
  {
    Sum a, b;
    for (std::size_t i = 0; i < n; ++i) {
      const LD y = static_cast<LD>(x[i]) - mu;
      a.add(y);
      b.add(y * y);
      s1[i + 1] = a.value();
      s2[i + 1] = b.value();
    }
  }
  // SSE of the points i..j-1 about their mean.
  auto cost = [&](std::size_t i, std::size_t j) -> LD {
    const LD c = static_cast<LD>(j - i), t1 = s1[j] - s1[i];
    const LD v = (s2[j] - s2[i]) - t1 * t1 / c;
    return v > 0 ? v : 0;
  };
  std::vector<LD> prev(n + 1, kInf), cur(n + 1, kInf);
  for (std::size_t j = 1; j <= n; ++j) prev[j] = cost(0, j);
  std::vector<std::vector<std::uint32_t>> split(k);  // split[m][j]: start of the last segment
  for (std::size_t m = 2; m <= k; ++m) {
    // prev: the best (m-1)-segmentation of each prefix; cur: m segments.
    std::fill(cur.begin(), cur.end(), kInf);
    auto& sp = split[m - 1];
    sp.assign(n + 1, 0);
    // Divide and conquer: opt(j) is monotone in j.
    struct Task {
      std::size_t jl, jh, il, ih;
    };
    std::vector<Task> stack{{m, n, m - 1, n - 1}};
    while (!stack.empty()) {
      const Task tk = stack.back();
      stack.pop_back();
      if (tk.jl > tk.jh) continue;
      const std::size_t j = (tk.jl + tk.jh) / 2;
      std::size_t best_i = std::max(tk.il, m - 1);
      LD best = kInf;
      for (std::size_t i = std::max(tk.il, m - 1); i <= std::min(tk.ih, j - 1); ++i) {
        const LD v = prev[i] + cost(i, j);
        if (v < best) best = v, best_i = i;
      }
      cur[j] = best;
      sp[j] = static_cast<std::uint32_t>(best_i);
      if (j > tk.jl) stack.push_back({tk.jl, j - 1, tk.il, best_i});
      stack.push_back({j + 1, tk.jh, best_i, tk.ih});
    }
    std::swap(prev, cur);
  }
  std::vector<std::size_t> bounds(k + 1);
  bounds[k] = n;
  for (std::size_t m = k; m >= 2; --m) bounds[m - 1] = split[m - 1][bounds[m]];
  bounds[0] = 0;
  LloydMaxResult r;
  r.levels.resize(k);
  for (std::size_t j = 0; j < k; ++j) r.levels[j] = mean_of(x, bounds[j], bounds[j + 1]);
  for (std::size_t j = 1; j < k; ++j)
    if (!(r.levels[j - 1] < r.levels[j]))
      throw Error(Error::Kind::internal, "k-means produced coinciding levels", where);
  r.thresholds = midpoints(r.levels);
  r.mse = segment_mse(x, bounds, r.levels);
  r.converged = true;
  return r;
}

std::shared_ptr<const Codebook> lloyd_max_codebook(Density d, int levels) {
  const std::string where = fmt::format("lloyd-max+levels={}+density={}", levels, to_string(d));
  check_levels(levels, 2, where);
  LloydMaxResult r = solve_lloyd_max(d, levels, 1e-13, 100000, false);
  if (!r.converged)
    throw Error(Error::Kind::internal, "the Lloyd-Max iteration did not converge", where);
  const int bits = static_cast<int>(std::bit_width(static_cast<unsigned>(levels - 1)));
  return std::make_shared<const Codebook>(std::move(r.levels), bits, where);
}

}  // namespace lobit
