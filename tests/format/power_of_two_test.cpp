// Power-of-two formats: layout, rounding in value (not in log2), overflow.
#include <doctest/doctest.h>

#include <cmath>

#include "lobit/error.hpp"
#include "lobit/format/power_of_two.hpp"
#include "test_util.hpp"

using namespace lobit;
using lobit::test::fmt;

TEST_CASE("signed power-of-two with zero: layout and rounding") {
  auto f = fmt("pow2+exp=3+bias=3");  // fields 1..7 hold 2^-2 .. 2^4
  CHECK(f->bits() == 4);
  CHECK(f->classify(0x0) == CodeClass::zero);
  CHECK(f->classify(0x8) == CodeClass::zero);
  CHECK(std::signbit(f->decode(0x8)));
  CHECK(f->decode(0x1) == 0.25);
  CHECK(f->decode(0x7) == 16.0);
  CHECK(f->decode(0xb) == -1.0);
  // The nearest value in value terms: the midpoint between 2^k and 2^(k+1) is 1.5 * 2^k.
  CHECK(f->decode(f->encode(1.49)) == 1.0);
  CHECK(f->decode(f->encode(1.51)) == 2.0);
  CHECK(f->decode(f->encode(1.5)) == 2.0);   // field 3 (odd) vs 4 (even)
  CHECK(f->decode(f->encode(3.0)) == 2.0);   // field 4 (even) vs 5 (odd)
  CHECK(f->decode(f->encode(3.0, Rounding::nearest_away)) == 4.0);
  CHECK(f->decode(f->encode(0.125)) == 0.0);  // zero (code 0) vs 2^-2 (field 1)
  CHECK(f->decode(f->encode(1000)) == 16.0);
  CHECK(f->decode(f->encode(-1000)) == -16.0);
  CHECK(std::signbit(f->decode(f->encode(-0.01))));
}

TEST_CASE("e8m0 rounding and overflow into its NaN code") {
  auto f = fmt("e8m0");
  CHECK(f->encode(1.0) == 127);
  CHECK(f->encode(0.0) == 0);  // no zero: the smallest value 2^-127
  CHECK(f->encode(-5.0) == 0);
  CHECK(f->encode(0x1p127 * 1.5) == 0xfe);  // the tie stays at the even field 254
  CHECK(f->encode(0x1p127 * 1.75, Rounding::nearest_even, Overflow::special) == 0xff);
  CHECK(f->encode(0x1p127 * 1.75) == 0xfe);  // default: saturate
  CHECK(f->encode(NAN) == 0xff);
  CHECK(f->encode(INFINITY, Rounding::nearest_even, Overflow::special) == 0xff);
}

TEST_CASE("power-of-two parameters out of range are refused") {
  CHECK_THROWS_AS(PowerOfTwo({.exp_bits = 16}), Error);
  CHECK_THROWS_AS(PowerOfTwo({.exp_bits = 11, .bias = 3000}), Error);
  CHECK_THROWS_AS(PowerOfTwo({.exp_bits = 1, .bias = 0, .sign = true, .zero = true, .nan = true}), Error);
}
