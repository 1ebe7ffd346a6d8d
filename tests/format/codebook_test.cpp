// Codebooks and the normal-quantile generator.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>

#include "lobit/error.hpp"
#include "lobit/format/codebook.hpp"
#include "test_util.hpp"

using namespace lobit;
using lobit::test::fmt;

// The 16 NF4 levels as float32, from Dettmers et al. 2023, "QLoRA: Efficient
// Finetuning of Quantized LLMs", appendix E (from memory).
static const float qlora_nf4[16] = {
    -1.0f, -0.6961928009986877f, -0.5250730514526367f, -0.39491748809814453f,
    -0.28444138169288635f, -0.18477343022823334f, -0.09105003625154495f, 0.0f,
    0.07958029955625534f, 0.16093020141124725f, 0.24611230194568634f, 0.33791524171829224f,
    0.44070982933044434f, 0.5626170039176941f, 0.7229568362236023f, 1.0f};

TEST_CASE("the nf4 preset holds the QLoRA appendix's float32 constants exactly") {
  auto f = fmt("nf4");
  REQUIRE(f->bits() == 4);
  for (Code c = 0; c < 16; ++c) {
    CHECK(f->decode(c) == static_cast<double>(qlora_nf4[c]));
    CHECK(static_cast<double>(static_cast<float>(f->decode(c))) == f->decode(c));  // exact float32
  }
}

TEST_CASE("the normal-quantile generator rebuilds nf4 the paper's way") {
  // Offset 0.9677083 as in the paper: the mean of 1 - 1/30 and 1 - 1/32, to 7 digits.
  const auto levels = normal_quantile_levels(4, 0.9677083);
  REQUIRE(levels.size() == 16);
  for (int i = 0; i < 16; ++i) CHECK(levels[static_cast<std::size_t>(i)] == static_cast<double>(qlora_nf4[i]));
  auto g = fmt("normal-quantile+bits=4+offset=0.9677083");
  for (Code c = 0; c < 16; ++c) CHECK(g->decode(c) == fmt("nf4")->decode(c));
  CHECK(normal_quantile_default_offset(4) == doctest::Approx(0.9677083).epsilon(1e-7));
}

TEST_CASE("normal-quantile levels for other widths keep the construction's shape") {
  for (int b = 2; b <= 8; ++b) {
    const auto v = normal_quantile_levels(b, normal_quantile_default_offset(b));
    INFO("bits ", b);
    REQUIRE(v.size() == (std::size_t{1} << b));
    CHECK(v.front() == -1.0);
    CHECK(v.back() == 1.0);
    CHECK(std::count(v.begin(), v.end(), 0.0) == 1);
    // Asymmetric halves: one more positive level than negative ones.
    CHECK(std::count_if(v.begin(), v.end(), [](double x) { return x > 0; }) == (1 << (b - 1)));
    CHECK(std::is_sorted(v.begin(), v.end()));
  }
}

TEST_CASE("codebook encode is nearest value; ties to the even code or the larger magnitude") {
  auto f = fmt("codebook+values=-1/-0.25/0/0.5/1");
  CHECK(f->bits() == 3);
  CHECK(f->classify(5) == CodeClass::unused);
  CHECK(f->classify(2) == CodeClass::zero);
  CHECK(f->encode(0.2) == 2);
  CHECK(f->encode(0.3) == 3);
  CHECK(f->encode(0.25) == 2);    // 0 (code 2, even) vs 0.5 (code 3)
  CHECK(f->encode(0.75) == 4);    // 0.5 (code 3) vs 1 (code 4, even)
  CHECK(f->encode(-0.625) == 0);  // -1 (code 0, even) vs -0.25 (code 1)
  CHECK(f->encode(0.25, Rounding::nearest_away) == 3);
  CHECK(f->encode(-0.625, Rounding::nearest_away) == 0);
  CHECK(f->encode(9.0) == 4);     // saturates
  CHECK(f->encode(-9.0) == 0);
  CHECK(f->encode(0.1, Rounding::up) == 3);
  CHECK(f->encode(-0.1, Rounding::toward_zero) == 2);
  CHECK_THROWS_AS(f->encode(NAN), Error);
}

TEST_CASE("bad codebooks are refused") {
  CHECK_THROWS_AS(Codebook({1.0}), Error);
  CHECK_THROWS_AS(Codebook({1.0, 1.0, 2.0}), Error);
  CHECK_THROWS_AS(Codebook({1.0, INFINITY}), Error);
  CHECK_THROWS_AS(Codebook({0, 1, 2, 3, 4}, 2), Error);
  CHECK_THROWS_AS(normal_quantile_levels(4, 0.4), Error);
}
