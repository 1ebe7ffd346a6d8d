#pragma once
// Minimum-MSE scalar quantizers: Lloyd-Max for the unit-variance densities,
// the optimum uniform quantizer, and their data-driven counterparts (Lloyd
// iterations and exact 1-D k-means), with a codebook maker for the results.
//
// An N-level quantizer is optimal (for MSE) only if every threshold is the
// midpoint of its neighbouring levels and every level is the centroid
// E[X | X in its cell] (Lloyd 1957/1982, Max 1960). For log-concave densities
// (all three here) that pair of conditions has exactly one solution (Fleischer
// 1964), which is the global optimum.
#include <memory>
#include <span>
#include <vector>

#include "lobit/format/codebook.hpp"
#include "lobit/measure/exact_error.hpp"

namespace lobit {

struct LloydMaxResult {
  std::vector<double> levels;      // sorted ascending
  std::vector<double> thresholds;  // levels.size() - 1, thresholds[i] between levels[i] and levels[i+1]
  double mse = 0;                  // density: exact_mse_levels(levels, d, 1); data: mean squared error
  int iterations = 0;
  bool converged = false;
};

// The optimal `levels`-level quantizer for the density (1 <= levels <= 65536).
// The midpoint and centroid conditions are solved by Newton's method on the
// thresholds (tridiagonal Jacobian, analytic centroid derivatives, step
// halving on the residual, a plain Lloyd step where Newton fails), in long
// double, from the Panter-Dite companding start (thresholds at the quantiles
// of p^(1/3), the high-resolution optimum). `iterations` counts those steps
// (plain Lloyd iterations converge linearly, at a rate near 1 - c/N^2).
// Converged: one more Lloyd step (levels -> midpoints -> centroids) moves no
// threshold and no level by more than `tolerance` (absolute, in units of the
// standard deviation). The levels are symmetric about 0 exactly, and `mse` is
// the exact 50-digit MSE of the nearest-level quantizer on them.
LloydMaxResult lloyd_max(Density d, int levels, double tolerance = 1e-13, int max_iterations = 100000);

// The optimum uniform quantizer: levels (i - (N-1)/2) * step, i = 0..N-1
// (mid-rise for even N, mid-tread with a zero level for odd N), thresholds at
// their midpoints, the outer cells saturating; step minimises the exact MSE
// (optimal_scale_levels on the half-integer grid). 2 <= levels <= 65536.
struct UniformOptimum {
  double step = 0;
  double mse = 0;
  std::vector<double> levels;
};
UniformOptimum optimal_uniform(Density d, int levels);

// Lloyd's iterations on data: start from the means of `levels` groups of
// nearly equal count in sorted order (a quantile start, over distinct values so
// that no two start levels coincide), then alternate nearest-level assignment
// (exact midpoints; a point on a midpoint goes to the lower level) and cell
// means until no point changes cell (converged) or max_iterations. A local
// optimum. Needs at least `levels` distinct finite values.
LloydMaxResult lloyd_data(std::span<const double> data, int levels, int max_iterations = 1000);

// The globally optimal 1-D k-means (minimum sum of squared errors) by dynamic
// programming over the sorted data: an optimal k-partition of sorted points is
// contiguous, and D_m(j) = min_i D_{m-1}(i) + SSE(i, j) has a monotone argmin
// (the SSE of sorted points satisfies the quadrangle inequality), so each layer
// is computed by divide and conquer in O(n log n): O(k n log n) time and k*n
// 32-bit split indices of memory (k*n <= 2^26, 256 MiB; beyond that a usage
// error). Segment costs come from compensated long double prefix sums of the
// data centred on its median, so the optimum is exact up to ties within
// ~1e-15 relative; the returned levels and mse are recomputed directly
// (compensated sums). `iterations` is 0, `converged` true.
// Needs at least `levels` distinct finite values.
LloydMaxResult kmeans_1d_exact(std::span<const double> data, int levels);

// The Lloyd-Max levels of `lloyd_max(d, levels)` as a codebook of
// ceil(log2 levels) bits (2 <= levels <= 65536), whose spec() is the generator
// text "lloyd-max+levels=<levels>+density=<gauss|laplace|uniform>".
std::shared_ptr<const Codebook> lloyd_max_codebook(Density d, int levels);

}  // namespace lobit
