#include "lobit/measure/exact_error.hpp"

// The exact MSE of a nearest-value saturating quantizer under a continuous
// density, as a sum of closed-form cell integrals in 50-digit arithmetic.
//
// Numerical analysis (why the numbers printed are right to binary64):
//  * Arithmetic: Boost.Multiprecision cpp_bin_float<50> (168-bit significand,
//    the backend of cpp_bin_float_50, used without expression templates),
//    erfc and exp from Boost.Math / Boost.Multiprecision, accurate to a few
//    units of 2^-166.
//  * Thresholds: the exact midpoint (v_i + v_{i+1}) / 2 of two neighbouring
//    binary64 values, formed in the 168-bit type and multiplied by the scale.
//    Both steps are exact whenever the neighbours lie within ~2^60 of each
//    other in exponent (every float and integer format); otherwise they round
//    at 2^-168 relative. A threshold that moves by d changes the MSE only by
//    O(d^2): at the midpoint the two neighbouring cells' integrands are equal,
//    so the first-order change cancels.
//  * Partial moments: P(a < X < b) is never a difference of CDFs near 1; for a
//    cell on the positive side it is a difference of upper tails Q(a) - Q(b)
//    (erfc), mirrored on the negative side, and 1 - Q(|a|) - Q(b) only for the
//    cell that straddles 0 (where it is at least Q-free). Narrow cells still
//    cancel in M2 - 2 c M1 + c^2 M0; each cell's rounding error is bounded from
//    the magnitudes of the terms, and a cell that would keep fewer than ~72
//    correct bits (only pathologically narrow ones: neighbours a few binary64
//    ulps apart) is integrated instead by 20-point Gauss-Legendre quadrature in
//    the same 168-bit type on pieces of width <= 0.25 (the integrand is smooth
//    and positive; the quadrature error is far below 2^-166 there).
//  * Tails: the integrals stop at |x| = T, with T = 20 for the Gaussian, 100
//    for the Laplacian and the support for the uniform density (there nothing
//    is lost). Every x maps to its nearest reconstruction point, so with
//    m = min |scale * v|, |x - q(x)| <= |x| + m and the part dropped is at most
//    2 E[x^2; |x| > T] + 2 m^2 P(|x| > T). For m <= 1 that is below 1e-85
//    (Gaussian) and 1e-56 (Laplacian) in absolute terms, while no format of at
//    most 16 bits has an MSE below ~5e-10 (the 65536-level Lloyd-Max
//    quantizer); for m > 1 the MSE is at least (m/2)^2 P(|x| < 1/2) > 0.09 m^2.
//    Either way the relative part dropped is below 1e-46.
//  * The result is converted to binary64 once, at the end.

#include <algorithm>
#include <boost/math/special_functions/erf.hpp>
#include <boost/multiprecision/cpp_bin_float.hpp>
#include <cmath>
#include <fmt/format.h>
#include <limits>
#include <memory>
#include <vector>

#include "lobit/error.hpp"
#include "lobit/format/value_table.hpp"

namespace lobit {

std::string_view to_string(Density d) {
  switch (d) {
    case Density::gauss: return "gauss";
    case Density::laplace: return "laplace";
    case Density::uniform: return "uniform";
  }
  return "?";
}

std::optional<Density> parse_density(std::string_view name) {
  if (name == "gauss") return Density::gauss;
  if (name == "laplace") return Density::laplace;
  if (name == "uniform") return Density::uniform;
  return std::nullopt;
}

namespace {

namespace mp = boost::multiprecision;
using Real = mp::number<mp::cpp_bin_float<50>, mp::et_off>;

Real rmax(const Real& a, const Real& b) { return a < b ? b : a; }
Real rmin(const Real& a, const Real& b) { return b < a ? b : a; }

const Real& real_sqrt2() {
  static const Real v = sqrt(Real(2));
  return v;
}
const Real& real_sqrt3() {
  static const Real v = sqrt(Real(3));
  return v;
}
const Real& real_inv_sqrt2pi() {
  static const Real v = 1 / sqrt(2 * boost::math::constants::pi<Real>());
  return v;
}

// |x| where the integrals stop (see the header comment of this file).
double cutoff(Density d) {
  switch (d) {
    case Density::gauss: return 20.0;
    case Density::laplace: return 100.0;
    case Density::uniform: return 1.75;  // just outside sqrt(3); the support is clipped exactly
  }
  return 20.0;
}

// ---------------------------------------------------------------------------
// The levels and their thresholds, prepared once per format.
struct LevelSet {
  std::vector<double> v;   // sorted, distinct, finite
  std::vector<Real> t;     // t[i]: exact midpoint of v[i], v[i+1]
  std::vector<double> td;  // binary64 nearest to t[i] (the scan and the range search)
  double max_abs = 0;      // max |v|
  std::ptrdiff_t zero = -1;  // index of the value 0
};

LevelSet make_levels(std::span<const double> levels, const std::string& where) {
  if (levels.empty()) throw usage_error("no levels given", where, "give at least one finite value");
  LevelSet L;
  L.v.assign(levels.begin(), levels.end());
  for (std::size_t i = 0; i < L.v.size(); ++i) {
    if (!std::isfinite(L.v[i])) throw usage_error("levels must be finite", where, "remove inf and NaN values");
    if (L.v[i] == 0) L.v[i] = 0.0;
    if (i && !(L.v[i - 1] < L.v[i]))
      throw usage_error("levels must be sorted and distinct", where, "sort the values and drop duplicates");
  }
  L.t.reserve(L.v.size());
  L.td.reserve(L.v.size());
  for (std::size_t i = 0; i + 1 < L.v.size(); ++i) {
    L.t.push_back((Real(L.v[i]) + Real(L.v[i + 1])) / 2);
    L.td.push_back(midpoint(L.v[i], L.v[i + 1]).nearest);
  }
  for (std::size_t i = 0; i < L.v.size(); ++i) {
    L.max_abs = std::max(L.max_abs, std::fabs(L.v[i]));
    if (L.v[i] == 0) L.zero = static_cast<std::ptrdiff_t>(i);
  }
  return L;
}

void check_scale(double scale, const std::string& where) {
  if (!(std::isfinite(scale) && scale > 0))
    throw usage_error(fmt::format("scale {} is not a finite positive number", scale), where,
                      "give a scale > 0, e.g. the block's amax divided by the format's max");
}

// Cells j_lo..j_hi are those that may meet (-T, T) at this scale; the others
// lie entirely beyond |x| > T. The cell holding x = 0 is always among them. Cell j is [s t[j-1], s t[j]] with t[-1] = -inf,
// t[n-1] = +inf. The search uses binary64 thresholds with a relative slack of
// 1e-9, so it only ever includes a cell too many.
std::pair<std::size_t, std::size_t> cell_range(const LevelSet& L, double s, double T) {
  const double lim = T / s * (1 + 1e-9);
  const std::size_t lo = static_cast<std::size_t>(std::upper_bound(L.td.begin(), L.td.end(), -lim) - L.td.begin());
  const std::size_t hi = static_cast<std::size_t>(std::lower_bound(L.td.begin(), L.td.end(), lim) - L.td.begin());
  return {lo, std::max(lo, hi)};
}

// ---------------------------------------------------------------------------
// Gauss-Legendre nodes and weights on [-1, 1] (Newton on the Legendre
// recurrence, started from the Tricomi approximation of the roots).
using std::abs;  // for the long double instance below (Real finds its abs by ADL)

template <class T>
struct GaussLegendre {
  std::vector<T> x, w;
};

template <class T>
GaussLegendre<T> gauss_legendre(int n, const T& tol) {
  GaussLegendre<T> g;
  const double pi = 3.141592653589793;
  for (int i = 0; i < n; ++i) {
    T x = T(std::cos(pi * (i + 0.75) / (n + 0.5)));
    T dp = 0;
    for (int it = 0; it < 100; ++it) {
      T p0 = 1, p1 = x;
      for (int k = 2; k <= n; ++k) {
        T p2 = ((2 * k - 1) * x * p1 - (k - 1) * p0) / k;
        p0 = p1;
        p1 = p2;
      }
      dp = n * (x * p1 - p0) / (x * x - 1);
      const T dx = p1 / dp;
      x -= dx;
      if (abs(dx) < tol) break;
    }
    g.x.push_back(x);
    g.w.push_back(2 / ((1 - x * x) * dp * dp));
  }
  return g;
}

const GaussLegendre<Real>& gl_real() {
  static const GaussLegendre<Real> g = gauss_legendre<Real>(20, Real("1e-48"));
  return g;
}
GaussLegendre<double> gl_double_of(int n) {
  const auto l = gauss_legendre<long double>(n, 1e-18L);
  GaussLegendre<double> d;
  for (std::size_t i = 0; i < l.x.size(); ++i) {
    d.x.push_back(static_cast<double>(l.x[i]));
    d.w.push_back(static_cast<double>(l.w[i]));
  }
  return d;
}

// Rules for the fast evaluation by piece width w: the integrand is
// (x - c)^k p(x) with k <= 2 exact in the rule, so the relative error is that
// of p's Taylor remainder, ~w^(2n-2) times a modest constant: below 1e-14 with
// 3 nodes for w <= 2e-3, 4 for w <= 0.03, 6 for w <= 0.15, 8 for w <= 0.5.
const GaussLegendre<double>& gl_double(double width) {
  static const GaussLegendre<double> g3 = gl_double_of(3), g4 = gl_double_of(4), g6 = gl_double_of(6),
                                     g8 = gl_double_of(8);
  if (width <= 2e-3) return g3;
  if (width <= 0.03) return g4;
  if (width <= 0.15) return g6;
  return g8;
}

// ---------------------------------------------------------------------------
// Exact (168-bit) cell integrals.

// A threshold in x-space with what the density's partial moments need there.
//  Gaussian: q0 = Q(|x|) (upper tail), q1 = phi(x), q2 = x phi(x).
//  Laplace:  q0, q1, q2 = I0, I1, I2 at |x|, with Ik(u) = int_u^inf t^k p(t) dt:
//            I0 = e/2, I1 = (u + 1/sqrt2) e/2, I2 = (u^2 + sqrt2 u + 1) e/2,
//            e = exp(-sqrt2 u)  (p(t) = exp(-sqrt2 |t|) / sqrt2).
//  Uniform:  x only.
struct Point {
  int inf = 0;  // -1: -infinity, +1: +infinity, 0: finite
  Real x, q0, q1, q2;
};

Point make_point(Density d, const Real& x) {
  Point p;
  p.x = x;
  const Real u = abs(x);
  switch (d) {
    case Density::gauss:
      p.q0 = boost::math::erfc(u / real_sqrt2()) / 2;
      p.q1 = exp(-(x * x) / 2) * real_inv_sqrt2pi();
      p.q2 = x * p.q1;
      break;
    case Density::laplace: {
      const Real e = exp(-real_sqrt2() * u);
      p.q0 = e / 2;
      p.q1 = (u + 1 / real_sqrt2()) * e / 2;
      p.q2 = (u * u + real_sqrt2() * u + 1) * e / 2;
      break;
    }
    case Density::uniform: break;
  }
  return p;
}

Point infinite_point(int sign) {
  Point p;
  p.inf = sign;
  return p;
}

// P(X > x) for a finite x.
Real upper_tail(Density d, const Real& x) {
  switch (d) {
    case Density::gauss: {
      const Real q = boost::math::erfc(abs(x) / real_sqrt2()) / 2;
      return x >= 0 ? q : 1 - q;
    }
    case Density::laplace: {
      const Real q = exp(-real_sqrt2() * abs(x)) / 2;
      return x >= 0 ? q : 1 - q;
    }
    case Density::uniform: {
      if (x >= real_sqrt3()) return Real(0);
      if (x <= -real_sqrt3()) return Real(1);
      return (real_sqrt3() - x) / (2 * real_sqrt3());
    }
  }
  return Real(0);
}

Real density_at(Density d, const Real& x) {
  switch (d) {
    case Density::gauss: return exp(-(x * x) / 2) * real_inv_sqrt2pi();
    case Density::laplace: return exp(-real_sqrt2() * abs(x)) / real_sqrt2();
    case Density::uniform: return abs(x) <= real_sqrt3() ? 1 / (2 * real_sqrt3()) : Real(0);
  }
  return Real(0);
}

struct CellIntegrals {
  Real m0;  // int p
  Real g;   // int (x - c) p
  Real e;   // int (x - c)^2 p
};

// Gauss-Legendre over [a, b] (finite, p smooth on it) in 168 bits.
void quadrature_piece(Density d, const Real& a, const Real& b, const Real& c, CellIntegrals& r) {
  const auto& gl = gl_real();
  const Real half = (b - a) / 2, mid = (a + b) / 2;
  for (std::size_t k = 0; k < gl.x.size(); ++k) {
    const Real x = mid + half * gl.x[k];
    const Real wp = gl.w[k] * half * density_at(d, x);
    const Real dx = x - c;
    r.m0 += wp;
    r.g += wp * dx;
    r.e += wp * dx * dx;
  }
}

CellIntegrals quadrature_cell(Density d, const Point& A, const Point& B, const Real& c, double T) {
  CellIntegrals r;
  Real a = A.inf ? Real(-T) : rmax(A.x, Real(-T));
  Real b = B.inf ? Real(T) : rmin(B.x, Real(T));
  if (!(a < b)) return r;
  std::vector<std::pair<Real, Real>> parts;
  if (d == Density::laplace && a < 0 && b > 0) {
    parts.emplace_back(a, Real(0));
    parts.emplace_back(Real(0), b);
  } else {
    parts.emplace_back(a, b);
  }
  for (const auto& [pa, pb] : parts) {
    const double len = static_cast<double>(pb - pa);
    const double pieces = std::ceil(len / 0.25);
    if (!(pieces <= 1e6))
      throw Error(Error::Kind::internal, "an ill-conditioned cell is too wide to integrate", "exact_mse",
                  "the scale is extreme for this format");
    const int k = std::max(1, static_cast<int>(pieces));
    const Real w = (pb - pa) / k;
    for (int i = 0; i < k; ++i) quadrature_piece(d, pa + w * i, i + 1 == k ? pb : pa + w * (i + 1), c, r);
  }
  return r;
}

CellIntegrals exact_cell(Density d, const Point& A, const Point& B, const Real& c, double T) {
  CellIntegrals r;
  if (d == Density::uniform) {
    // p = 1/(2 sqrt3) on [-sqrt3, sqrt3]: integrate the clipped cell directly;
    // both cubes have the sign of their base, so nothing cancels for c inside.
    const Real& r3 = real_sqrt3();
    const Real a = A.inf ? -r3 : rmax(A.x, -r3);
    const Real b = B.inf ? r3 : rmin(B.x, r3);
    if (!(a < b)) return r;
    const Real p = 1 / (2 * r3);
    const Real da = a - c, db = b - c;
    r.m0 = p * (b - a);
    r.g = p * (db * db - da * da) / 2;
    r.e = p * (db * db * db - da * da * da) / 3;
    return r;
  }
  // Partial moments M0, M1, M2 over [A, B] and the magnitudes of what was
  // subtracted to form them (for the rounding-error bound).
  Real m0, m1, m2, mag0, mag1, mag2;
  const bool right = !A.inf && A.x >= 0;  // the whole cell on x >= 0
  const bool left = !B.inf && B.x <= 0;   // the whole cell on x <= 0
  if (d == Density::gauss) {
    // M0 from upper tails on the cell's own side; M1 = phi(a) - phi(b);
    // M2 = M0 + a phi(a) - b phi(b) (integration by parts).
    if (right) m0 = A.q0 - B.q0, mag0 = A.q0 + B.q0;
    else if (left) m0 = B.q0 - A.q0, mag0 = A.q0 + B.q0;
    else m0 = 1 - A.q0 - B.q0, mag0 = 1;
    m1 = A.q1 - B.q1;
    mag1 = A.q1 + B.q1;
    m2 = m0 + A.q2 - B.q2;
    mag2 = mag0 + abs(A.q2) + abs(B.q2);
  } else {
    // Laplace: Mk = Ik(a) - Ik(b) on the right, mirrored on the left (odd k
    // changes sign), and (1, I1 difference, 1) minus both tails across 0.
    if (right) {
      m0 = A.q0 - B.q0, m1 = A.q1 - B.q1, m2 = A.q2 - B.q2;
      mag0 = A.q0 + B.q0, mag1 = A.q1 + B.q1, mag2 = A.q2 + B.q2;
    } else if (left) {
      m0 = B.q0 - A.q0, m1 = A.q1 - B.q1, m2 = B.q2 - A.q2;
      mag0 = A.q0 + B.q0, mag1 = A.q1 + B.q1, mag2 = A.q2 + B.q2;
    } else {
      m0 = 1 - A.q0 - B.q0, m1 = A.q1 - B.q1, m2 = 1 - A.q2 - B.q2;
      mag0 = 1, mag1 = A.q1 + B.q1, mag2 = 1;
    }
  }
  r.m0 = m0;
  r.g = m1 - c * m0;
  r.e = m2 - 2 * c * m1 + c * c * m0;
  // Rounding-error bound of e: 64 units of 2^-166 on every term's magnitude.
  static const Real unit = ldexp(Real(1), -160);
  const Real err = unit * (mag2 + 2 * abs(c) * mag1 + c * c * mag0);
  static const Real need = ldexp(Real(1), -72);
  if (!(r.e > 0) || err > need * r.e) return quadrature_cell(d, A, B, c, T);
  return r;
}

struct ExactEval {
  ExactError error;
  Real mse;
  Real deriv;  // dMSE/dscale
};

// dMSE/ds = -2 sum_j v_j int_cell (x - s v_j) p(x) dx: the terms from moving
// the thresholds cancel in pairs, because at a midpoint threshold the two
// neighbouring cells' integrands are equal.
ExactEval exact_eval(const LevelSet& L, Density d, double s) {
  const std::size_t n = L.v.size();
  const double T = cutoff(d);
  const auto [lo, hi] = cell_range(L, s, T);
  const Real S(s);
  // Thresholds lo-1 .. hi, each computed once and shared by two cells.
  const std::size_t first = lo == 0 ? 0 : lo - 1;
  std::vector<Point> pts;
  for (std::size_t i = first; i <= hi && i + 1 < n; ++i) pts.push_back(make_point(d, S * L.t[i]));
  const Point minus_inf = infinite_point(-1), plus_inf = infinite_point(1);
  Real total = 0, deriv = 0, zero_probability = 0;
  for (std::size_t j = lo; j <= hi; ++j) {
    const Point& A = j == 0 ? minus_inf : pts[j - 1 - first];
    const Point& B = j == n - 1 ? plus_inf : pts[j - first];
    const Real c = S * L.v[j];
    const CellIntegrals r = exact_cell(d, A, B, c, T);
    total += r.e;
    deriv -= 2 * Real(L.v[j]) * r.g;
    if (static_cast<std::ptrdiff_t>(j) == L.zero) zero_probability = r.m0;
  }
  ExactEval out;
  out.mse = total;
  out.deriv = deriv;
  ExactError& e = out.error;
  e.mse = total.convert_to<double>();
  e.signal_power = 1;
  e.sqnr_db = total > 0 ? (-10 * log10(total)).convert_to<double>() : std::numeric_limits<double>::infinity();
  const Real clip = upper_tail(d, S * L.v.back()) + upper_tail(d, -(S * L.v.front()));
  e.clip_probability = clip.convert_to<double>();
  e.zero_probability = zero_probability.convert_to<double>();
  return out;
}

// ---------------------------------------------------------------------------
// The fast binary64 evaluation for the scale search: the same integrals by
// Gauss-Legendre on pieces of width <= 0.5 (3 to 8 nodes by width, see
// gl_double; the uniform density in closed form). Relative accuracy ~1e-13,
// limited by x - c in binary64 on narrow cells: enough to find the minima,
// whose reported values all come from the exact evaluation. Returns the MSE
// and dMSE/ds.
struct FastEval {
  double mse = 0, deriv = 0;
};

struct Neumaier {
  double sum = 0, comp = 0;
  void add(double x) {
    const double t = sum + x;
    if (std::fabs(sum) >= std::fabs(x)) comp += (sum - t) + x;
    else comp += (x - t) + sum;
    sum = t;
  }
  double value() const { return sum + comp; }
};

double density_double(Density d, double x) {
  switch (d) {
    case Density::gauss: return std::exp(-0.5 * x * x) * 0.3989422804014327;
    case Density::laplace: return std::exp(-1.4142135623730951 * std::fabs(x)) * 0.7071067811865476;
    case Density::uniform: return 0.28867513459481287;
  }
  return 0;
}

FastEval fast_eval(const LevelSet& L, Density d, double s) {
  const std::size_t n = L.v.size();
  const double T = cutoff(d);
  const double support = d == Density::uniform ? 1.7320508075688772 : T;
  const auto [lo, hi] = cell_range(L, s, T);
  Neumaier e_sum, d_sum;
  for (std::size_t j = lo; j <= hi; ++j) {
    double a = j == 0 ? -support : std::max(s * L.td[j - 1], -support);
    double b = j == n - 1 ? support : std::min(s * L.td[j], support);
    if (!(a < b)) continue;
    const double c = s * L.v[j];
    double e = 0, g = 0;
    if (d == Density::uniform) {
      const double p = 0.28867513459481287, da = a - c, db = b - c;
      e = p * (db * db * db - da * da * da) / 3;
      g = p * (db * db - da * da) / 2;
    } else {
      auto integrate = [&](double pa, double pb) {
        const int k = std::max(1, static_cast<int>(std::ceil((pb - pa) / 0.5)));
        const double w = (pb - pa) / k;
        for (int i = 0; i < k; ++i) {
          const double qa = pa + w * i, qb = i + 1 == k ? pb : pa + w * (i + 1);
          const double half = (qb - qa) / 2, mid = (qa + qb) / 2;
          const auto& gl = gl_double(qb - qa);
          for (std::size_t m = 0; m < gl.x.size(); ++m) {
            const double x = mid + half * gl.x[m];
            const double wp = gl.w[m] * half * density_double(d, x);
            const double dx = x - c;
            g += wp * dx;
            e += wp * dx * dx;
          }
        }
      };
      if (d == Density::laplace && a < 0 && b > 0) {
        integrate(a, 0);
        integrate(0, b);
      } else {
        integrate(a, b);
      }
    }
    e_sum.add(e);
    d_sum.add(-2 * L.v[j] * g);
  }
  return {e_sum.value(), d_sum.value()};
}

// ---------------------------------------------------------------------------
// The scale search.

double reach(Density d) {
  switch (d) {
    case Density::gauss: return 3.0;
    case Density::laplace: return 4.0;
    case Density::uniform: return 1.7320508075688772;
  }
  return 3.0;
}

// Regula falsi with the Illinois modification on f over [a, b], f(a) <= 0 <= f(b).
template <class F>
double illinois(F&& f, double a, double fa, double b, double fb, double rel, int max_it) {
  int side = 0;
  double c = a;
  for (int it = 0; it < max_it; ++it) {
    if (fa == 0) return a;
    if (fb == 0) return b;
    c = (a * fb - b * fa) / (fb - fa);
    if (!(c > a && c < b)) c = 0.5 * (a + b);
    const double fc = f(c);
    if (fc == 0) return c;
    if (fc < 0) {
      a = c, fa = fc;
      if (side == -1) fb /= 2;
      side = -1;
    } else {
      b = c, fb = fc;
      if (side == 1) fa /= 2;
      side = 1;
    }
    if (b - a <= rel * c) break;
  }
  return c;
}

struct Candidate {
  double scale;
  double fast_mse;
  double grid_lo, grid_hi;  // the grid bracket it came from
};

OptimalScale optimize_scale(const LevelSet& L, Density d, const std::string& where) {
  if (L.v.size() < 2 || L.max_abs == 0)
    throw usage_error("a scale search needs at least two values", where, "give a format with two or more values");
  constexpr int K = 401;
  const double step = 8.0 * std::log(10.0) / (K - 1);
  double start = std::log(reach(d) / L.max_abs) - 4.0 * std::log(10.0);
  std::vector<double> f(K), u(K);
  int best = -1;
  for (int attempt = 0; attempt < 10; ++attempt) {
    for (int k = 0; k < K; ++k) {
      u[k] = start + step * k;
      const double s = std::exp(u[k]);
      f[k] = (std::isfinite(s) && s > 0) ? fast_eval(L, d, s).mse : std::numeric_limits<double>::infinity();
      if (std::isnan(f[k])) f[k] = std::numeric_limits<double>::infinity();
    }
    best = static_cast<int>(std::min_element(f.begin(), f.end()) - f.begin());
    if (best == 0) start -= 4.0 * std::log(10.0);
    else if (best == K - 1) start += 4.0 * std::log(10.0);
    else break;
    if (start < -700 || start > 700) break;
  }
  if (best <= 0 || best >= K - 1)
    throw usage_error("the MSE has no minimum inside the searchable range of scales", where,
                      "it keeps falling toward the end of binary64's range; evaluate chosen scales with "
                      "exact_mse instead");
  // Every local minimum of the grid within 5% of the best grid value (at most
  // 64, the lowest first): floating-point formats have one per factor of 2 in
  // the scale, equal to ~1e-6, and the grid alone cannot rank them.
  std::vector<int> minima;
  for (int k = 1; k + 1 < K; ++k)
    if (f[k] <= f[k - 1] && f[k] <= f[k + 1] && (f[k] < f[k - 1] || f[k] < f[k + 1]) && f[k] <= f[best] * 1.05)
      minima.push_back(k);
  if (std::find(minima.begin(), minima.end(), best) == minima.end()) minima.push_back(best);
  std::sort(minima.begin(), minima.end(), [&](int a, int b) { return f[a] < f[b]; });
  if (minima.size() > 64) minima.resize(64);

  auto fmse = [&](double uu) { return fast_eval(L, d, std::exp(uu)).mse; };
  auto fderiv = [&](double s) { return fast_eval(L, d, s).deriv; };
  std::vector<Candidate> cands;
  for (int k : minima) {
    const double glo = std::exp(u[k - 1]), ghi = std::exp(u[k + 1]);
    // The root of the (fast) derivative in the grid bracket, where it brackets
    // one and that root is no worse than the grid point; golden section on
    // log(scale) otherwise.
    double s = std::exp(u[k]);
    double fs = f[k];
    const double dl = fderiv(glo), dh = fderiv(ghi);
    bool found = false;
    if (dl <= 0 && dh >= 0) {
      const double r = illinois(fderiv, glo, dl, ghi, dh, 1e-12, 100);
      const double fr = fast_eval(L, d, r).mse;
      if (fr <= f[k]) s = r, fs = fr, found = true;
    }
    if (!found) {
      double a = u[k - 1], b = u[k + 1];
      const double gr = 0.6180339887498949;
      double x1 = b - gr * (b - a), x2 = a + gr * (b - a);
      double f1 = fmse(x1), f2 = fmse(x2);
      while (b - a > 1e-9) {
        if (f1 <= f2) {
          b = x2, x2 = x1, f2 = f1;
          x1 = b - gr * (b - a);
          f1 = fmse(x1);
        } else {
          a = x1, x1 = x2, f1 = f2;
          x2 = a + gr * (b - a);
          f2 = fmse(x2);
        }
      }
      s = std::exp(0.5 * (a + b));
      fs = fast_eval(L, d, s).mse;
    }
    cands.push_back({s, fs, glo, ghi});
  }
  // The candidate with the lowest fast MSE. Candidates within the fast
  // evaluation's accuracy (~1e-13 relative) of each other are equal minima
  // for every purpose (floats repeat themselves at scale * 2^k); the first wins.
  const Candidate* pick = &cands.front();
  for (const auto& c : cands)
    if (c.fast_mse < pick->fast_mse) pick = &c;

  // Exact polish: bracket the root of the exact derivative within 1e-10
  // relative and step into it (regula falsi); Illinois on a wider bracket
  // where the fast root was off.
  auto deriv = [&](double s) { return exact_eval(L, d, s).deriv.convert_to<double>(); };
  double s = pick->scale;
  for (double rel = 1e-10; rel < 1; rel *= 100) {
    const double sl = std::max(pick->grid_lo, s * (1 - rel)), sh = std::min(pick->grid_hi, s * (1 + rel));
    const double dl = deriv(sl), dh = deriv(sh);
    if (dl <= 0 && dh >= 0) {
      if (rel <= 1e-10 && dh > dl) {
        s = (sl * dh - sh * dl) / (dh - dl);
        if (!(s >= sl && s <= sh)) s = 0.5 * (sl + sh);
      } else {
        s = illinois(deriv, sl, dl, sh, dh, 1e-13, 200);
      }
      break;
    }
    if (sl == pick->grid_lo && sh == pick->grid_hi) break;
  }
  return OptimalScale{s, exact_eval(L, d, s).error};
}

}  // namespace

ExactError exact_mse_levels(std::span<const double> levels, Density d, double scale) {
  const std::string where = "exact_mse";
  check_scale(scale, where);
  const LevelSet L = make_levels(levels, where);
  return exact_eval(L, d, scale).error;
}

namespace {
std::vector<double> format_values(const ElementFormat& f, const std::string& where) {
  if (f.bits() > 16)
    throw usage_error(fmt::format("{} has {} bits; exact errors are computed for formats of up to 16 bits",
                                  f.spec(), f.bits()),
                      where, "use a format of at most 16 bits (wider ones are beyond enumeration)");
  const ValueTable table(f);
  return table.values();
}
}  // namespace

ExactError exact_mse(const ElementFormat& f, Density d, double scale) {
  const std::string where = "exact_mse " + f.spec();
  check_scale(scale, where);
  const auto values = format_values(f, where);
  const LevelSet L = make_levels(values, where);
  return exact_eval(L, d, scale).error;
}

OptimalScale optimal_scale_levels(std::span<const double> levels, Density d) {
  const std::string where = "optimal_scale";
  const LevelSet L = make_levels(levels, where);
  return optimize_scale(L, d, where);
}

OptimalScale optimal_scale(const ElementFormat& f, Density d) {
  const std::string where = "optimal_scale " + f.spec();
  const auto values = format_values(f, where);
  const LevelSet L = make_levels(values, where);
  return optimize_scale(L, d, where);
}

}  // namespace lobit
