// The three model families of `lobit fit`: CDFs and log CDFs (Boost.Math, with tail
// series where the CDF underflows), the EDF distances (KS, AD) and the Student-t
// maximum-likelihood fit.
#include <algorithm>
#include <array>
#include <boost/math/distributions/laplace.hpp>
#include <boost/math/distributions/normal.hpp>
#include <boost/math/distributions/students_t.hpp>
#include <boost/math/special_functions/digamma.hpp>
#include <boost/math/special_functions/gamma.hpp>
#include <boost/math/special_functions/trigamma.hpp>
#include <cmath>
#include <limits>
#include <numbers>

#include "fit_parallel.hpp"
#include "lobit/measure/fit.hpp"

namespace lobit {

using fit_detail::CompensatedSum;

std::string family_name(Family f) {
  switch (f) {
    case Family::gauss: return "gauss";
    case Family::laplace: return "laplace";
    case Family::student_t: return "student-t";
  }
  return "?";
}

namespace fit_detail {

double log_normal_lower_tail(double z) {
  // Phi(z) = phi(z) / |z| * (1 - 1/z^2 + 3/z^4 - 15/z^6 + ...): an asymptotic series whose
  // error is below the first term left out; at |z| >= 20 twenty terms reach 1e-30.
  const double z2 = z * z;
  double term = 1, sum = 1;
  for (int k = 1; k <= 20; ++k) {
    term *= -(2.0 * k - 1) / z2;
    sum += term;
    if (std::abs(term) < 1e-18) break;
  }
  return -0.5 * z2 - std::log(-z) - 0.5 * std::log(2 * std::numbers::pi) + std::log(sum);
}

double log_t_lower_tail(double z, double nu) {
  const double a = nu / 2, b = 0.5;
  const double az = std::abs(z);
  // ln w and ln(1 - w) for w = nu / (nu + z^2), without forming z^2 (it may overflow).
  const double r = nu / az / az;  // nu / z^2
  const double log_w = std::log(nu) - 2 * std::log(az) - std::log1p(r);
  const double log_1mw = -std::log1p(r);
  const double w = std::exp(log_w);
  // 2F1(a + b, 1; a + 1; w) = sum_k (a + b)_k / (a + 1)_k w^k: the ratio of terms is below
  // w (b < 1), so the series converges geometrically.
  double term = 1, sum = 1;
  for (int k = 0; k < 100000; ++k) {
    term *= (a + b + k) / (a + 1 + k) * w;
    sum += term;
    if (term < 1e-17 * sum) break;
  }
  const double lbeta = boost::math::lgamma(a) + boost::math::lgamma(b) - boost::math::lgamma(a + b);
  return std::log(0.5) + a * log_w + b * log_1mw - std::log(a) - lbeta + std::log(sum);
}

}  // namespace fit_detail

namespace {

constexpr double kMinNormal = std::numeric_limits<double>::min();

// Boost.Math in binary64 throughout (by default it promotes double arithmetic to long
// double, several times slower for the same ~1e-15 relative accuracy of a CDF).
using Policy = boost::math::policies::policy<boost::math::policies::promote_double<false>>;

// F(x) and 1 - F(x): the tail nearer x from Boost.Math (so it keeps its relative accuracy
// far out), the other as its complement (at least 1/2, so nothing is lost).
void cdf_pair(const Model& m, double x, double& F, double& S) {
  const bool lower = x <= m.loc;
  switch (m.family) {
    case Family::gauss: {
      const boost::math::normal_distribution<double, Policy> d(m.loc, m.scale);
      if (lower)
        F = boost::math::cdf(d, x), S = 1 - F;
      else
        S = boost::math::cdf(boost::math::complement(d, x)), F = 1 - S;
      return;
    }
    case Family::laplace: {
      const boost::math::laplace_distribution<double, Policy> d(m.loc, m.scale);
      if (lower)
        F = boost::math::cdf(d, x), S = 1 - F;
      else
        S = boost::math::cdf(boost::math::complement(d, x)), F = 1 - S;
      return;
    }
    case Family::student_t: {
      const boost::math::students_t_distribution<double, Policy> d(m.nu);
      const double z = (x - m.loc) / m.scale;
      if (lower)
        F = boost::math::cdf(d, z), S = 1 - F;
      else
        S = boost::math::cdf(boost::math::complement(d, z)), F = 1 - S;
      return;
    }
  }
}

// ln F where F is below the smallest normal double (F may be 0 or subnormal), for the
// lower tail at standardised z < 0.
double log_lower_tail(const Model& m, double z) {
  switch (m.family) {
    case Family::gauss: return fit_detail::log_normal_lower_tail(z);
    case Family::laplace: return z - std::numbers::ln2;  // F = exp(z) / 2 below the location
    case Family::student_t: return fit_detail::log_t_lower_tail(z, m.nu);
  }
  return NAN;
}

// ln F and ln(1 - F) from F and S = 1 - F: the smaller of the two by its own log (or the
// tail series when it underflows), the larger by log1p of the other.
void log_pair(const Model& m, double x, double F, double S, double& lnF, double& lnS) {
  const double z = (x - m.loc) / m.scale;
  if (F <= 0.5)
    lnF = F >= kMinNormal ? std::log(F) : log_lower_tail(m, z);
  else
    lnF = std::log1p(-S);
  if (S <= 0.5)
    lnS = S >= kMinNormal ? std::log(S) : log_lower_tail(m, -z);
  else
    lnS = std::log1p(-F);
}

}  // namespace

double Model::cdf(double x) const {
  double F, S;
  cdf_pair(*this, x, F, S);
  return F;
}

double Model::log_cdf(double x) const {
  double F, S, lnF, lnS;
  cdf_pair(*this, x, F, S);
  log_pair(*this, x, F, S, lnF, lnS);
  return lnF;
}

double Model::log_ccdf(double x) const {
  double F, S, lnF, lnS;
  cdf_pair(*this, x, F, S);
  log_pair(*this, x, F, S, lnF, lnS);
  return lnS;
}

double Model::log_pdf(double x) const {
  const double z = (x - loc) / scale;
  switch (family) {
    case Family::gauss: return -0.5 * z * z - std::log(scale) - 0.5 * std::log(2 * std::numbers::pi);
    case Family::laplace: return -std::abs(z) - std::log(2 * scale);
    case Family::student_t:
      return boost::math::lgamma((nu + 1) / 2) - boost::math::lgamma(nu / 2) - 0.5 * std::log(nu * std::numbers::pi) -
             std::log(scale) - (nu + 1) / 2 * std::log1p(z * z / nu);
  }
  return NAN;
}

EdfDistances edf_distances(std::span<const double> x, const Model& m, int threads) {
  EdfDistances out;
  const std::size_t n = x.size();
  if (n == 0) return out;
  const double dn = static_cast<double>(n);
  struct Part {
    double ks = 0;
    CompensatedSum ad;
  };
  // Values equal to their neighbour share one CDF evaluation: positions i0 + 1 .. i0 + c
  // (1-based) hold the same value v. KS: the EDF runs from i0/n to (i0 + c)/n at v. AD:
  // sum over those positions of (2i - 1) ln F(v) + (2n + 1 - 2i) ln(1 - F(v)), which is
  // the usual formula with the second sum re-indexed.
  const auto parts = fit_detail::map_blocks<Part>(n, 4096, threads, [&](std::size_t b, std::size_t e) {
    Part p;
    for (std::size_t i = b; i < e;) {
      std::size_t j = i + 1;
      while (j < e && x[j] == x[i]) ++j;
      double F, S, lnF, lnS;
      cdf_pair(m, x[i], F, S);
      log_pair(m, x[i], F, S, lnF, lnS);
      const double i0 = static_cast<double>(i), c = static_cast<double>(j - i);
      p.ks = std::max({p.ks, (i0 + c) / dn - F, F - i0 / dn});
      p.ad.add(((i0 + c) * (i0 + c) - i0 * i0) * lnF);
      p.ad.add(c * (2 * dn - 2 * i0 - c) * lnS);
      i = j;
    }
    return p;
  });
  CompensatedSum ad;
  for (const auto& p : parts) {
    out.ks = std::max(out.ks, p.ks);
    ad.add(p.ad);
  }
  out.ad = -dn - ad.value() / dn;
  return out;
}

// ---- Student-t maximum likelihood ----------------------------------------------------

namespace {

constexpr double kNuMin = 0.5, kNuMax = 1000;

struct Distinct {
  std::vector<double> x, w;
  double n = 0;
};

Distinct compress(std::span<const double> sorted) {
  Distinct d;
  for (std::size_t i = 0; i < sorted.size();) {
    std::size_t j = i + 1;
    while (j < sorted.size() && sorted[j] == sorted[i]) ++j;
    d.x.push_back(sorted[i]);
    d.w.push_back(static_cast<double>(j - i));
    i = j;
  }
  d.n = static_cast<double>(sorted.size());
  return d;
}

// Mean log-likelihood, gradient and Hessian in theta = (mu, s = ln sigma, t = ln nu).
// With V = nu sigma^2, D = V + r^2, a = V / D, u = r^2 / D, q = r / D, L = ln(1 + r^2 / V):
//   l      = c(t) - s - (nu + 1)/2 L,  c(t) = lgamma((nu + 1)/2) - lgamma(nu/2) - ln(nu pi)/2
//   l_mu   = (nu + 1) q                l_s = -1 + (nu + 1) u
//   l_t    = c'(t) - nu/2 L + (nu + 1)/2 u
//   l_mumu = (nu + 1)(u - a) / D       l_mus = -2 (nu + 1) q a      l_mut = q (nu - (nu + 1) a)
//   l_ss   = -2 (nu + 1) u a           l_st = u (nu - (nu + 1) a)
//   l_tt   = c''(t) - nu/2 L + nu u - (nu + 1)/2 u a
struct TEval {
  double ll = -INFINITY;
  std::array<double, 3> g{};
  std::array<std::array<double, 3>, 3> h{};
};

TEval evaluate_t(const Distinct& d, double mu, double s, double t, int threads) {
  const double nu = std::exp(t), V = std::exp(t + 2 * s);
  struct Sums {
    CompensatedSum L, q, u, mumu, qa, ua;
  };
  const auto parts = fit_detail::map_blocks<Sums>(d.x.size(), 16384, threads, [&](std::size_t b, std::size_t e) {
    Sums p;
    for (std::size_t i = b; i < e; ++i) {
      const double w = d.w[i], r = d.x[i] - mu, r2 = r * r, D = V + r2, inv = 1 / D;
      const double a = V * inv, u = r2 * inv, q = r * inv;
      p.L.add(w * std::log1p(r2 / V));
      p.q.add(w * q);
      p.u.add(w * u);
      p.mumu.add(w * (u - a) * inv);
      p.qa.add(w * q * a);
      p.ua.add(w * u * a);
    }
    return p;
  });
  Sums s_all;
  for (const auto& p : parts) {
    s_all.L.add(p.L), s_all.q.add(p.q), s_all.u.add(p.u);
    s_all.mumu.add(p.mumu), s_all.qa.add(p.qa), s_all.ua.add(p.ua);
  }
  const double L = s_all.L.value() / d.n, q = s_all.q.value() / d.n, u = s_all.u.value() / d.n;
  const double mumu = s_all.mumu.value() / d.n, qa = s_all.qa.value() / d.n, ua = s_all.ua.value() / d.n;
  const double h1 = (nu + 1) / 2, h0 = nu / 2;
  const double c = boost::math::lgamma(h1) - boost::math::lgamma(h0) - 0.5 * std::log(nu * std::numbers::pi);
  const double dpsi = boost::math::digamma(h1) - boost::math::digamma(h0);
  const double c1 = h0 * dpsi - 0.5;
  const double c2 = h0 * dpsi + h0 * h0 * (boost::math::trigamma(h1) - boost::math::trigamma(h0));
  TEval ev;
  ev.ll = c - s - h1 * L;
  ev.g = {(nu + 1) * q, -1 + (nu + 1) * u, c1 - h0 * L + h1 * u};
  const double ha = nu * q - (nu + 1) * qa;  // l_mut
  const double hs = nu * u - (nu + 1) * ua;  // l_st
  ev.h[0] = {(nu + 1) * mumu, -2 * (nu + 1) * qa, ha};
  ev.h[1] = {-2 * (nu + 1) * qa, -2 * (nu + 1) * ua, hs};
  ev.h[2] = {ha, hs, c2 - h0 * L + nu * u - h1 * ua};
  if (!std::isfinite(ev.ll)) ev.ll = -INFINITY;
  return ev;
}

// Expected information per value in (mu, s, t) (Lange, Little and Taylor, "Robust
// statistical modeling using the t distribution", JASA 84 (1989), from memory): the
// fallback direction where the observed Hessian is not negative definite. Only the
// direction depends on it; the line search and the gradient decide the answer.
std::array<std::array<double, 3>, 3> expected_information(double sigma, double nu) {
  const double i_mumu = (nu + 1) / ((nu + 3) * sigma * sigma);
  const double i_ss = 2 * nu / (nu + 3);
  const double i_st = -2 * nu / ((nu + 1) * (nu + 3));
  double i_tt = nu * nu * (0.25 * (boost::math::trigamma(nu / 2) - boost::math::trigamma((nu + 1) / 2)) -
                           (nu + 5) / (2 * nu * (nu + 1) * (nu + 3)));
  if (!(i_tt > 0)) i_tt = 1e-12;
  return {{{i_mumu, 0, 0}, {0, i_ss, i_st}, {0, i_st, i_tt}}};
}

// Solves A x = g for the symmetric positive definite A restricted to the first k
// coordinates (Cholesky); false when A is not positive definite there.
bool solve_spd(std::array<std::array<double, 3>, 3> A, std::array<double, 3> g, int k, std::array<double, 3>& x) {
  std::array<std::array<double, 3>, 3> Lm{};
  for (int i = 0; i < k; ++i)
    for (int j = 0; j <= i; ++j) {
      double s = A[i][j];
      for (int p = 0; p < j; ++p) s -= Lm[i][p] * Lm[j][p];
      if (i == j) {
        if (!(s > 1e-300)) return false;
        Lm[i][i] = std::sqrt(s);
      } else {
        Lm[i][j] = s / Lm[j][j];
      }
    }
  std::array<double, 3> y{};
  for (int i = 0; i < k; ++i) {
    double s = g[i];
    for (int p = 0; p < i; ++p) s -= Lm[i][p] * y[p];
    y[i] = s / Lm[i][i];
  }
  x = {0, 0, 0};
  for (int i = k - 1; i >= 0; --i) {
    double s = y[i];
    for (int p = i + 1; p < k; ++p) s -= Lm[p][i] * x[p];
    x[i] = s / Lm[i][i];
  }
  return true;
}

}  // namespace

StudentTFit fit_student_t(std::span<const double> sorted, int threads) {
  StudentTFit out;
  out.loc = out.scale = out.nu = out.log_likelihood = NAN;
  const std::size_t n = sorted.size();
  if (n < 3) return out;
  const Distinct d = compress(sorted);
  if (d.x.size() < 3) return out;
  // Start: median; nu from the excess kurtosis of a t (6 / (nu - 4)); sigma from the
  // interquartile range of that t.
  const double median = n % 2 ? sorted[n / 2] : 0.5 * (sorted[n / 2 - 1] + sorted[n / 2]);
  CompensatedSum sum;
  for (double v : sorted) sum.add(v);
  const double mean = sum.value() / static_cast<double>(n);
  CompensatedSum s2, s4;
  for (double v : sorted) {
    const double e = (v - mean) * (v - mean);
    s2.add(e);
    s4.add(e * e);
  }
  const double m2 = s2.value() / static_cast<double>(n), m4 = s4.value() / static_cast<double>(n);
  const double kurt = m4 / (m2 * m2) - 3;
  double nu0 = kurt > 6.0 / (kNuMax - 4) ? 4 + 6 / kurt : kNuMax;
  nu0 = std::clamp(nu0, 1.0, kNuMax);
  const double iqr = sorted[(3 * (n - 1)) / 4] - sorted[(n - 1) / 4];
  const double q75 = boost::math::quantile(boost::math::students_t_distribution<double, Policy>(nu0), 0.75);
  double sigma0 = iqr > 0 ? iqr / (2 * q75) : std::sqrt(m2 * std::max(nu0 - 2, 1.0) / nu0);
  if (!(sigma0 > 0) || !std::isfinite(sigma0)) return out;

  const double t_lo = std::log(kNuMin), t_hi = std::log(kNuMax);
  std::array<double, 3> th = {median, std::log(sigma0), std::log(nu0)};
  TEval ev = evaluate_t(d, th[0], th[1], th[2], threads);
  const double s_floor = th[1] - 40;  // sigma shrinking by e^40: the likelihood is unbounded (a point mass)
  double size = INFINITY;
  for (int it = 1; it <= 300; ++it) {
    out.iterations = it;
    const double sigma = std::exp(th[1]), nu = std::exp(th[2]);
    // At a bound of nu with the gradient pointing out, nu stays there.
    const bool frozen = (th[2] <= t_lo && ev.g[2] < 0) || (th[2] >= t_hi && ev.g[2] > 0);
    const int k = frozen ? 2 : 3;
    std::array<std::array<double, 3>, 3> negH;
    for (int i = 0; i < 3; ++i)
      for (int j = 0; j < 3; ++j) negH[i][j] = -ev.h[i][j];
    std::array<double, 3> step;
    if (!solve_spd(negH, ev.g, k, step) && !solve_spd(expected_information(sigma, nu), ev.g, k, step)) break;
    size = std::max({std::abs(step[0]) / sigma, std::abs(step[1]), std::abs(step[2])});
    // Predicted gain of the step; below the rounding of the mean log-likelihood no line
    // search can see an improvement, and the parameters are then known far better than
    // their sampling error.
    const double gain = ev.g[0] * step[0] + ev.g[1] * step[1] + ev.g[2] * step[2];
    if (size < 1e-10 || gain < 1e-14 * std::max(1.0, std::abs(ev.ll))) {
      out.converged = true;
      break;
    }
    bool accepted = false;
    for (double alpha = 1; alpha >= 1e-6; alpha *= 0.5) {
      std::array<double, 3> tr = {th[0] + alpha * step[0], th[1] + alpha * step[1],
                                  std::clamp(th[2] + alpha * step[2], t_lo, t_hi)};
      TEval e2 = evaluate_t(d, tr[0], tr[1], tr[2], threads);
      if (e2.ll >= ev.ll + 1e-4 * alpha * gain) {  // Armijo's sufficient increase
        th = tr;
        ev = e2;
        accepted = true;
        break;
      }
    }
    if (!accepted) {
      // No ascent along the direction: converged up to rounding if the step was tiny.
      out.converged = size < 1e-6;
      break;
    }
    if (th[1] < s_floor) break;
  }
  out.loc = th[0];
  out.scale = std::exp(th[1]);
  out.nu = std::exp(th[2]);
  out.log_likelihood = ev.ll;
  if (!std::isfinite(out.log_likelihood) || th[1] < s_floor) out.converged = false;
  return out;
}

}  // namespace lobit
