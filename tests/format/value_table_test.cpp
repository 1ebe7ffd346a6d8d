// Exact decision thresholds: checked against Boost.Multiprecision arithmetic.
#include <doctest/doctest.h>

#include <boost/multiprecision/cpp_bin_float.hpp>
#include <cmath>
#include <random>

#include "lobit/format/codebook.hpp"
#include "lobit/format/value_table.hpp"
#include "test_util.hpp"

using namespace lobit;
using lobit::test::fmt;
using Big = boost::multiprecision::number<
    boost::multiprecision::cpp_bin_float<2200, boost::multiprecision::digit_base_2>, boost::multiprecision::et_off>;

namespace {
// reference: Boost.Multiprecision cpp_bin_float, wide enough for any sum of two doubles
int exact_compare(double x, double a, double b) {
  const Big m = (Big(a) + Big(b)) / 2;
  const Big bx(x);
  return bx < m ? -1 : (bx > m ? 1 : 0);
}
}  // namespace

TEST_CASE("threshold comparisons are exact for every preset's neighbours") {
  for (const char* name : {"e2m1", "e3m2", "e2m3", "e4m3", "e5m2", "fp16", "bf16", "nf4", "int8", "e8m0"}) {
    auto f = fmt(name);
    const ValueTable t(*f);
    INFO("preset ", name);
    const auto& v = t.values();
    for (std::size_t i = 0; i + 1 < v.size(); i += (v.size() > 2000 ? 37 : 1)) {
      const Threshold& th = t.thresholds()[i];
      for (double x : {th.nearest, std::nextafter(th.nearest, -INFINITY), std::nextafter(th.nearest, INFINITY)})
        CHECK(th.compare(x) == exact_compare(x, v[i], v[i + 1]));
    }
  }
}

TEST_CASE("midpoints that binary64 cannot hold keep their exact position") {
  std::mt19937_64 rng(5);
  int inexact = 0;
  for (int i = 0; i < 20000; ++i) {
    double a = std::ldexp(std::uniform_real_distribution<double>(1, 2)(rng), static_cast<int>(rng() % 2000) - 1000);
    double b = a * (1 + std::uniform_real_distribution<double>(0, 1e-3)(rng)) + std::ldexp(1.0, -1074);
    if (i % 3 == 0) b = std::nextafter(a, INFINITY);  // midpoint of adjacent doubles: never a double
    if (i % 5 == 0) a = std::ldexp(1.0, -1074) * static_cast<double>(rng() % 1000 + 1), b = std::nextafter(a, 1);
    if (!(a < b)) continue;
    const Threshold th = midpoint(a, b);
    inexact += !th.exact_in_double();
    for (double x : {a, b, th.nearest, std::nextafter(th.nearest, -INFINITY), std::nextafter(th.nearest, INFINITY)})
      CHECK(th.compare(x) == exact_compare(x, a, b));
  }
  CHECK(inexact > 1000);
  // A codebook whose neighbours are 300 binades apart.
  const Codebook cb({1e-300, 1.0});
  const ValueTable t(cb);
  CHECK_FALSE(t.thresholds()[0].exact_in_double());
  CHECK(cb.encode(0.5) == 0);  // 0.5 lies just below the midpoint 0.5 + 0.5e-300
  CHECK(cb.encode(std::nextafter(0.5, 1)) == 1);
  CHECK(cb.encode(0.5, Rounding::nearest_even) == (exact_compare(0.5, 1e-300, 1.0) > 0 ? 1 : 0));
  CHECK(exact_midpoint_decimal(1.0, 2.0).rfind("1.5", 0) == 0);
}

TEST_CASE("tie sides follow the code-parity rule") {
  auto f = fmt("e4m3");
  const ValueTable t(*f);
  for (std::size_t i = 0; i + 1 < t.values().size(); ++i) {
    const Threshold& th = t.thresholds()[i];
    const Code winner = th.tie_to_upper ? t.codes()[i + 1] : t.codes()[i];
    CHECK((winner & 1) == 0);
    CHECK(f->decode(f->encode(th.nearest)) == f->decode(winner));  // -0 and +0 compare equal
  }
}

TEST_CASE("the table encoder of the block-quantization hot loop equals each format's encode") {
  std::mt19937_64 rng(9);
  for (const auto& p : presets()) {
    if (p.scaled()) continue;
    auto f = fmt(p.name.c_str());
    if (f->bits() > 16) continue;
    const NearestTable nt(*f);
    INFO("preset ", p.name);
    if (!nt.usable()) continue;
    const ValueTable t(*f);
    std::vector<double> xs = {0.0, -0.0, 1e300, -1e300};
    for (const auto& th : t.thresholds())
      xs.insert(xs.end(), {th.nearest, std::nextafter(th.nearest, -INFINITY), std::nextafter(th.nearest, INFINITY)});
    for (double v : t.values()) xs.push_back(v);
    std::uniform_real_distribution<double> u(t.values().front() * 1.2, t.values().back() * 1.2);
    for (int i = 0; i < 2000; ++i) xs.push_back(u(rng));
    for (double x : xs) {
      const Code want = f->encode(x, Rounding::nearest_even, Overflow::saturate);
      CHECK(nt.encode(x) == want);
      CHECK(lobit::test::same_value(nt.decode(want), f->decode(want)));
    }
  }
}
