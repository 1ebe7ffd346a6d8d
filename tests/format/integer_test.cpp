// Integers and fixed point: every parameterisation, against the value table.
#include <doctest/doctest.h>

#include <cmath>
#include <random>

#include "lobit/error.hpp"
#include "lobit/format/integer.hpp"
#include "lobit/format/value_table.hpp"
#include "test_util.hpp"

using namespace lobit;
using lobit::test::fmt;

TEST_CASE("every integer layout decodes to its two's complement or unsigned value") {
  for (int b = 2; b <= 16; ++b)
    for (int sign = 0; sign <= 1; ++sign)
      for (int sym = 0; sym <= sign; ++sym)
        for (int frac : {0, 3, 6}) {
          const Integer f({.bits = b, .sign = sign == 1, .symmetric = sym == 1, .frac_bits = frac});
          INFO("format ", f.spec());
          for (Code c = 0; c <= f.code_count_minus_one(); ++c) {
            std::int64_t k = static_cast<std::int64_t>(c);
            if (sign && c >= (Code{1} << (b - 1))) k -= std::int64_t{1} << b;  // two's complement
            if (sym && k == -(std::int64_t{1} << (b - 1))) {
              CHECK(f.classify(c) == CodeClass::unused);
              continue;
            }
            CHECK(f.decode(c) == std::ldexp(static_cast<double>(k), -frac));
          }
        }
}

TEST_CASE("integer encode equals the exact value table for every layout up to 10 bits") {
  std::mt19937_64 rng(3);
  for (int b = 2; b <= 10; ++b)
    for (int sign = 0; sign <= 1; ++sign)
      for (int sym = 0; sym <= sign; ++sym)
        for (int frac : {0, 2, 6}) {
          const Integer f({.bits = b, .sign = sign == 1, .symmetric = sym == 1, .frac_bits = frac});
          const ValueTable t(f);
          INFO("format ", f.spec());
          std::vector<double> xs;
          for (double v : t.values()) xs.insert(xs.end(), {v, std::nextafter(v, -1e9), std::nextafter(v, 1e9)});
          for (const auto& th : t.thresholds())
            xs.insert(xs.end(), {th.nearest, std::nextafter(th.nearest, -1e9), std::nextafter(th.nearest, 1e9)});
          const double top = t.values().back();
          std::uniform_real_distribution<double> u(-1.5 * top, 1.5 * top);
          for (int i = 0; i < 300; ++i) xs.push_back(u(rng));
          xs.insert(xs.end(), {INFINITY, -INFINITY, 1e300, -1e300, 0.0, -0.0});
          for (Rounding r : lobit::test::all_roundings)
            for (double x : xs) {
              const auto w = static_cast<std::uint32_t>(rng());
              const Code a = f.encode(x, r, Overflow::special, w), bb = t.encode(x, r, Overflow::special, w);
              if (a != bb) FAIL_CHECK("x=", x, " rounding ", to_string(r), " arithmetic ", a, " table ", bb);
            }
        }
}

TEST_CASE("int4 rounds halves to even and saturates (common practice)") {
  auto f = fmt("int4");
  CHECK(f->decode(f->encode(2.5)) == 2.0);
  CHECK(f->decode(f->encode(3.5)) == 4.0);
  CHECK(f->decode(f->encode(-2.5)) == -2.0);
  CHECK(f->decode(f->encode(2.5, Rounding::nearest_away)) == 3.0);
  CHECK(f->decode(f->encode(7.6)) == 7.0);
  CHECK(f->decode(f->encode(-8.4)) == -8.0);
  CHECK(f->decode(f->encode(-100)) == -8.0);
  CHECK(f->decode(f->encode(INFINITY)) == 7.0);
  CHECK(f->decode(f->encode(2.1, Rounding::up)) == 3.0);
  CHECK(f->decode(f->encode(-2.1, Rounding::up)) == -2.0);
  CHECK(f->decode(f->encode(-2.1, Rounding::toward_zero)) == -2.0);
  CHECK(f->decode(f->encode(-2.1, Rounding::down)) == -3.0);
  CHECK_THROWS_AS(f->encode(NAN), Error);
  auto s = fmt("int4+range=symmetric");
  CHECK(s->decode(s->encode(-100)) == -7.0);
  auto u = fmt("uint4");
  CHECK(u->decode(u->encode(-3)) == 0.0);
  CHECK(u->decode(u->encode(15.4)) == 15.0);
}

TEST_CASE("integer parameters out of range are refused") {
  CHECK_THROWS_AS(Integer({.bits = 1}), Error);
  CHECK_THROWS_AS(Integer({.bits = 17}), Error);
  CHECK_THROWS_AS(Integer({.bits = 4, .sign = false, .symmetric = true}), Error);
  CHECK_THROWS_AS(Integer({.bits = 4, .frac_bits = 40}), Error);
}
