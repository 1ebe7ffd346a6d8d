// Every preset against the standard or paper that defines it.
#include <doctest/doctest.h>

#include <cfloat>
#include <cmath>

#include "lobit/format/properties.hpp"
#include "test_util.hpp"

using namespace lobit;
using lobit::test::fmt;

namespace {
struct Expected {
  const char* name;
  double max, min_normal, min_subnormal;  // min_subnormal 0: none
  std::vector<Code> nan_codes;
  std::vector<Code> inf_codes;
};

void check_preset(const Expected& e) {
  INFO("preset ", e.name);
  auto f = fmt(e.name);
  const FormatProperties p = properties(*f);
  CHECK(p.max_finite == e.max);
  REQUIRE(p.min_normal.has_value());
  CHECK(*p.min_normal == e.min_normal);
  if (e.min_subnormal == 0) CHECK_FALSE(p.min_subnormal.has_value());
  else {
    REQUIRE(p.min_subnormal.has_value());
    CHECK(*p.min_subnormal == e.min_subnormal);
  }
  if (f->bits() <= 16) {
    std::vector<Code> nans, infs;
    for (Code c = 0; c <= f->code_count_minus_one(); ++c) {
      if (f->classify(c) == CodeClass::nan) nans.push_back(c);
      if (f->classify(c) == CodeClass::infinity) infs.push_back(c);
    }
    CHECK(nans == e.nan_codes);
    CHECK(infs == e.inf_codes);
  }
}

std::vector<Code> range(Code a, Code b) {
  std::vector<Code> r;
  for (Code c = a; c <= b; ++c) r.push_back(c);
  return r;
}
std::vector<Code> join(std::vector<Code> a, const std::vector<Code>& b) {
  a.insert(a.end(), b.begin(), b.end());
  return a;
}
}  // namespace

// OCP 8-bit Floating Point Specification (OFP8) rev. 1.0, table of E4M3 and E5M2
// properties: E4M3 max 448 = S.1111.110, min normal 2^-6, min subnormal 2^-9,
// NaN S.1111.111, no infinities; E5M2 max 57344, min normal 2^-14, min
// subnormal 2^-16, infinities S.11111.00, NaN S.11111.{01,10,11}. (from memory)
TEST_CASE("e4m3 and e5m2 match the OCP 8-bit float spec") {
  check_preset({"e4m3", 448, 0x1p-6, 0x1p-9, {0x7f, 0xff}, {}});
  check_preset({"e5m2", 57344, 0x1p-14, 0x1p-16, join(range(0x7d, 0x7f), range(0xfd, 0xff)), {0x7c, 0xfc}});
}

// OCP Microscaling Formats (MX) v1.0, element data types: FP6 E3M2 max 28, min
// normal 2^-2, min subnormal 2^-4; FP6 E2M3 max 7.5, min normal 1, min
// subnormal 2^-3; FP4 E2M1 max 6, min normal 1, min subnormal 0.5; no NaN or
// infinity in any of them. (from memory)
TEST_CASE("MX element formats match the OCP Microscaling spec") {
  check_preset({"e3m2", 28, 0x1p-2, 0x1p-4, {}, {}});
  check_preset({"e2m3", 7.5, 1.0, 0x1p-3, {}, {}});
  check_preset({"e2m1", 6, 1.0, 0.5, {}, {}});
}

// OCP Microscaling Formats (MX) v1.0, E8M0 scale: 2^(code-127), code 0 is 2^-127,
// 0xFE is 2^127, 0xFF is NaN, no zero, no sign. (from memory)
TEST_CASE("e8m0 matches the OCP Microscaling scale format") {
  auto f = fmt("e8m0");
  CHECK(f->decode(0x00) == 0x1p-127);
  CHECK(f->decode(0x7f) == 1.0);
  CHECK(f->decode(0xfe) == 0x1p127);
  CHECK(f->classify(0xff) == CodeClass::nan);
  for (Code c = 0; c < 0xff; ++c) CHECK(f->decode(c) == std::ldexp(1.0, static_cast<int>(c) - 127));
  const FormatProperties p = properties(*f);
  CHECK(p.distinct_finite == 255);
  CHECK(p.nan_codes == 1);
  CHECK_FALSE(p.negative_zero.has_value());
}

// IEEE 754-2019 section 3.6, binary16/binary32 parameters, and <cfloat>.
TEST_CASE("fp16, bf16, fp32 and fp64 limits match IEEE 754 and <cfloat>") {
  // binary16: max 65504, min normal 2^-14, min subnormal 2^-24
  check_preset({"fp16", 65504, 0x1p-14, 0x1p-24, join(range(0x7c01, 0x7fff), range(0xfc01, 0xffff)), {0x7c00, 0xfc00}});
  // bfloat16: max 0x7f7f = (2 - 2^-7) * 2^127, min normal 2^-126, min subnormal 2^-133
  check_preset({"bf16", 0x1.fep127, 0x1p-126, 0x1p-133, join(range(0x7f81, 0x7fff), range(0xff81, 0xffff)), {0x7f80, 0xff80}});
  // binary32 and binary64 from the compiler's <cfloat> (reference: C standard section 5.2.4.2.2)
  check_preset({"fp32", FLT_MAX, FLT_MIN, FLT_TRUE_MIN, {}, {}});
  check_preset({"fp64", DBL_MAX, DBL_MIN, DBL_TRUE_MIN, {}, {}});
  auto f32 = fmt("fp32");
  CHECK(f32->classify(0x7f800000) == CodeClass::infinity);
  CHECK(f32->classify(0x7fc00000) == CodeClass::nan);
  CHECK(*f32->nan_code() == 0x7fc00000);  // quiet NaN (IEEE 754-2019 section 6.2.1)
  CHECK(properties(*f32).distinct_finite == (Code{1} << 32) - 2 * (Code{1} << 23) - 1);
}

// Noune et al. 2022, "8-bit numerical formats for deep neural networks",
// section 3: no negative zero, 0x80 the single NaN, bias 2^(E-1); E4M3 max
// 240 = 1.111 * 2^7, E5M2 max 57344 = 1.11 * 2^15. (from memory)
TEST_CASE("single-NaN 8-bit floats match Noune et al.") {
  check_preset({"e4m3-single-nan", 240, 0x1p-7, 0x1p-10, {0x80}, {}});
  check_preset({"e5m2-single-nan", 57344, 0x1p-15, 0x1p-17, {0x80}, {}});
  CHECK_FALSE(fmt("e4m3-single-nan")->has_negative_zero());
  CHECK(fmt("e4m3-single-nan")->encode(-0.0) == 0x00);
  CHECK(fmt("e4m3-single-nan")->encode(-1e-9) == 0x00);
}

TEST_CASE("integer presets span their two's complement or unsigned range (common practice)") {
  for (int b = 2; b <= 8; ++b) {
    auto s = parse_element("int" + std::to_string(b));
    auto u = parse_element("uint" + std::to_string(b));
    const FormatProperties ps = properties(*s), pu = properties(*u);
    CHECK(ps.max_finite == std::ldexp(1.0, b - 1) - 1);
    CHECK(ps.lowest_finite == -std::ldexp(1.0, b - 1));
    CHECK(ps.distinct_finite == (Code{1} << b));
    CHECK(pu.max_finite == std::ldexp(1.0, b) - 1);
    CHECK(pu.lowest_finite == 0);
  }
  CHECK(fmt("int4")->decode(0x8) == -8.0);  // int4 is -8..7
  CHECK(fmt("int4")->decode(0x7) == 7.0);
}

// OCP MX v1.0 INT8 element: two's complement with an implicit 2^-6; the spec
// gives its range as +-(1 + 63/64), so 0x80 (-2) is not used. (from memory)
TEST_CASE("int8-frac6 is the MX INT8 element") {
  auto f = fmt("int8-frac6");
  CHECK(f->decode(0x7f) == 127.0 / 64);
  CHECK(f->decode(0x81) == -127.0 / 64);
  CHECK(f->decode(0x01) == 0x1p-6);
  CHECK(f->classify(0x80) == CodeClass::unused);
  CHECK(f->encode(-5.0) == 0x81);  // saturates to -127/64, never the unused code
}
