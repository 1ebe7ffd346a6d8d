// Scaled formats: spec parsing, bits per element, the scale rules on
// hand-worked blocks, and whole-tensor quantization.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <random>

#include "lobit/error.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/measure/score.hpp"
#include "lobit/scale/quantize.hpp"
#include "lobit/scale/scaled_format.hpp"

using namespace lobit;

namespace {
QuantizedTensor q1(const char* spec, std::vector<float> x) {
  auto f = parse_scaled(spec);
  return quantize_tensor(*f, x, 1, x.size(), 1);
}
}  // namespace

// OCP Microscaling Formats (MX) v1.0, section 5 (concrete formats): k = 32
// elements share one E8M0 scale: MXFP4 4.25, MXFP6 6.25, MXFP8 8.25, MXINT8
// 8.25 bits per element (from memory).
TEST_CASE("bits per element of the OCP MX formats") {
  CHECK(parse_scaled("e2m1@32:e8m0")->nominal_bits_per_element() == 4.25);
  CHECK(parse_scaled("e3m2@32:e8m0")->nominal_bits_per_element() == 6.25);
  CHECK(parse_scaled("e2m3@32:e8m0")->nominal_bits_per_element() == 6.25);
  CHECK(parse_scaled("e4m3@32:e8m0")->nominal_bits_per_element() == 8.25);
  CHECK(parse_scaled("int8-frac6@32:e8m0")->nominal_bits_per_element() == 8.25);
  CHECK(parse_scaled("e2m1@32:e8m0")->bits_per_element(64, 4096) == 4.25);
}

// QLoRA (Dettmers et al. 2023), section 3, double quantization: 4-bit NF4 with
// blocks of 64, the fp32 block scales quantized to 8-bit floats in blocks of
// 256: 4 + 8/64 + 32/(64*256) = 4.127 bits per parameter (from memory).
TEST_CASE("bits per element with double quantization of the scales") {
  auto f = parse_scaled("nf4@64:fp32,scales=e4m3@256:fp32");
  CHECK(f->nominal_bits_per_element() == 4.0 + 8.0 / 64 + 32.0 / (64 * 256));
  CHECK(f->nominal_bits_per_element() == doctest::Approx(4.127).epsilon(1e-3));
  CHECK(f->bits_per_element(256, 64 * 256) == 4.0 + 8.0 / 64 + 32.0 / (64 * 256));
  CHECK(parse_scaled("nf4@64:fp32")->nominal_bits_per_element() == 4.5);
}

TEST_CASE("bits per element: rows, columns, tensors, ragged blocks, zero points, micro-exponents") {
  CHECK(parse_scaled("int8@row:fp32")->bits_per_element(4096, 1024) == 8.0 + 32.0 / 1024);
  CHECK(parse_scaled("int8@col:fp32")->bits_per_element(4096, 1024) == 8.0 + 32.0 / 4096);
  CHECK(parse_scaled("int8@tensor:fp32")->bits_per_element(1000, 1000) == 8.0 + 32.0 / 1e6);
  CHECK(parse_scaled("int4@128:fp16,zero=uint4")->nominal_bits_per_element() == 4.0 + 20.0 / 128);
  // 100 columns in blocks of 32: 4 blocks per row (the last one 4 elements long).
  CHECK(parse_scaled("e2m1@32:e8m0")->bits_per_element(10, 100) == 4.0 + 8.0 * 4 / 100);
  CHECK(parse_scaled("e2m1@32:e8m0")->bits_per_element(100, 10, 0) == 4.0 + 8.0 * 4 / 100);
  // Two-level: E4M3 per 16 and one fp32 per tensor.
  CHECK(parse_scaled("e2m1@16:e4m3,tensor-scale=fp32")->bits_per_element(16, 1024) == 4.5 + 32.0 / (16 * 1024));
  // Shared micro-exponents (Rouhani et al., ISCA 2023): 8-bit exponent per 16, 1-bit offset per 2,
  // sign + 7-bit magnitude: 8 + 8/16 + 1/2 = 9 bits (the paper's 9-bit variant).
  CHECK(parse_scaled("int+bits=8+range=symmetric+frac=6@16:e8m0,sub=2:1")->nominal_bits_per_element() == 9.0);
  CHECK(parse_scaled("int+bits=4+range=symmetric+frac=2@16:e8m0,sub=2:1")->nominal_bits_per_element() == 5.0);
}

// OCP MX v1.0, section 6.3 (conversion): shared exponent floor(log2(amax)) -
// emax(element), elements then quantized and clamped (from memory).
TEST_CASE("the MX scale rule on hand-worked blocks") {
  auto r = q1("e2m1@4:e8m0", {1.0f, 2.0f, 3.0f, 6.0f});  // amax 6: log2 -> 2, emax(E2M1) 2: X = 2^0
  CHECK(r.scales[0] == 1.0);
  CHECK(r.scale_codes[0] == 127);
  CHECK(r.values == std::vector<double>{1, 2, 3, 6});
  r = q1("e2m1@4:e8m0", {0.1f, 7.0f, -7.9f, 0.0f});  // amax 7.9: floor(log2) 2: X = 1; 7 and -7.9 saturate to +-6
  CHECK(r.scales[0] == 1.0);
  CHECK(r.values == std::vector<double>{0.0, 6, -6, 0});
  r = q1("e2m1@4:e8m0", {12.0f, 1.0f, 0.0f, 0.0f});  // amax 12: 3 - 2 = 1: X = 2
  CHECK(r.scales[0] == 2.0);
  CHECK(r.values == std::vector<double>{12, 1, 0, 0});
  r = q1("e4m3@2:e8m0", {448.0f, -1.0f});  // emax(E4M3) 8: X = 2^0
  CHECK(r.scales[0] == 1.0);
  r = q1("int8-frac6@2:e8m0", {1.5f, -0.25f});  // emax(MX INT8) 0
  CHECK(r.scales[0] == 1.0);
  CHECK(r.values == std::vector<double>{1.5, -0.25});
  // amax = 0: the smallest scale 2^-127, every element 0; no log2(0).
  r = q1("e2m1@2:e8m0", {0.0f, -0.0f});
  CHECK(r.scales[0] == 0x1p-127);
  CHECK(r.values[0] == 0.0);
  // A subnormal amax: ilogb is exact for subnormals; the exponent clamps at -127.
  r = q1("e2m1@2:e8m0", {0x1p-140f, 0.0f});
  CHECK(r.scales[0] == 0x1p-127);
  CHECK(r.values[0] == 0.0);  // 2^-140 / 2^-127 = 2^-13 rounds to 0 in E2M1
  r = q1("e2m1@2:e8m0", {0x1p-120f, 0.0f});  // -120 - 2 = -122: within range
  CHECK(r.scales[0] == 0x1p-122);
  CHECK(r.values[0] == 0x1p-120);
  // Beyond the top of E8M0: the scale clamps to 2^127 and the group is reported saturated.
  auto f = parse_scaled("e2m1@2:e8m0");
  const GroupQuantizer gq(*f);
  GroupSummary s;
  s.amax = 0x1p1000;
  const GroupScale g = gq.choose(s);
  CHECK(g.saturated);
  CHECK(g.scale == 0x1p127);
  // A NaN or infinity in the block: the scale is NaN (0xFF) and the block decodes to NaN.
  r = q1("e2m1@2:e8m0", {1.0f, NAN});
  CHECK(std::isnan(r.scales[0]));
  CHECK(r.scale_codes[0] == 0xff);
  CHECK(std::isnan(r.values[0]));
  CHECK(r.nan_groups == 1);
}

TEST_CASE("absmax, noclip and mse rules with float scales") {
  auto r = q1("int4@4:fp16", {7.0f, -3.0f, 1.0f, 0.5f});  // amax / 7 = 1
  CHECK(r.scales[0] == 1.0);
  CHECK(r.values == std::vector<double>{7, -3, 1, 0});
  r = q1("int4@2:fp16", {1.0f, 0.3f});  // 1/7 rounds to nearest in fp16
  CHECK(r.scales[0] == static_cast<double>(static_cast<_Float16>(1.0 / 7)));  // reference: the compiler's _Float16
  // noclip: the stored scale never lets the largest input clip.
  std::mt19937 rng(1);
  std::normal_distribution<float> nd;
  for (int i = 0; i < 2000; ++i) {
    std::vector<float> x(16);
    for (auto& v : x) v = nd(rng) * 3.0f;
    auto f = parse_scaled("e2m1@16:e4m3,rule=noclip");
    auto q = quantize_tensor(*f, x, 1, 16, 1);
    double amax = 0;
    for (float v : x) amax = std::max(amax, std::fabs(static_cast<double>(v)));
    CHECK(amax / q.scales[0] <= 6.0);
    // mse never does worse than absmax, noclip or the MX rule on its own group.
    auto err_of = [&](const char* spec) {
      auto q = quantize_tensor(*parse_scaled(spec), x, 1, 16, 1);
      double e = 0;
      for (int k = 0; k < 16; ++k) e += std::pow(q.values[k] - x[k], 2);
      return e;
    };
    const double em = err_of("e2m1@16:e4m3,rule=mse");
    CHECK(em <= err_of("e2m1@16:e4m3"));
    CHECK(em <= err_of("e2m1@16:e4m3,rule=noclip"));
    const double em8 = err_of("e2m1@16:e8m0,rule=mse");
    CHECK(em8 <= err_of("e2m1@16:e8m0"));
    CHECK(em8 <= err_of("e2m1@16:e8m0,rule=noclip"));
  }
  // A float scale that underflows: reported, the group quantizes to zero.
  r = q1("int4@2:fp16", {1e-9f, 0.0f});
  CHECK(r.underflow_groups == 1);
  CHECK(r.values[0] == 0.0);
}

TEST_CASE("affine integer groups: x ~ s (q - z)") {
  // min 0.5 -> the range is widened to include 0: [0, 3.5]; s = 3.5 / 15 in fp16, z = 0.
  auto r = q1("uint4@4:fp16,zero=uint4", {0.5f, 1.0f, 2.0f, 3.5f});
  const double s = static_cast<double>(static_cast<_Float16>(3.5 / 15));  // reference: the compiler's _Float16
  CHECK(r.scales[0] == s);
  CHECK(r.zeros[0] == 0);
  // A range around zero: z = round(-min / s).
  r = q1("uint4@4:fp16,zero=uint4", {-1.0f, 0.0f, 1.0f, 2.0f});
  const double s2 = static_cast<double>(static_cast<_Float16>(3.0 / 15));
  CHECK(r.scales[0] == s2);
  CHECK(r.zeros[0] == std::nearbyint(1.0 / s2));
  for (int i = 0; i < 4; ++i) CHECK(std::fabs(r.values[i] - std::vector<double>{-1, 0, 1, 2}[i]) <= s2 / 2 + 1e-12);
  CHECK(r.values[1] == 0.0);  // zero is exact: z is an integer
}

TEST_CASE("two-level scales: block scales times one per-tensor scale") {
  std::vector<float> x(64);
  for (int i = 0; i < 64; ++i) x[i] = static_cast<float>((i - 20) * 0.37);
  auto f = parse_scaled("e2m1@16:e4m3,tensor-scale=fp32");
  auto r = quantize_tensor(*f, x, 1, 64, 1);
  double amax = 0;
  for (float v : x) amax = std::max(amax, std::fabs(static_cast<double>(v)));
  CHECK(r.tensor_scale == static_cast<double>(static_cast<float>(amax / (6.0 * 448.0))));
  for (double s : r.scales) CHECK(s / r.tensor_scale <= 448.0);
}

TEST_CASE("shared micro-exponents shift quiet sub-blocks down") {
  auto f = parse_scaled("int+bits=4+range=symmetric+frac=2@4:e8m0,sub=2:1");
  // Block amax 1.5 -> E = 0 (emax of the element 1.75 is 2^0). Sub-block (0.2, 0.1)
  // has amax 0.2: its own exponent -3, so it takes the full offset 1: scale 2^-1.
  auto r = quantize_tensor(*f, std::vector<float>{1.5f, -1.0f, 0.2f, 0.1f}, 1, 4, 1);
  CHECK(r.scales[0] == 1.0);
  CHECK(r.values[0] == 1.5);
  CHECK(r.values[2] == 0.25);  // 0.2 / 0.5 = 0.4 -> 0.5 (grid 0.25) -> 0.25
  CHECK(r.values[3] == 0.125);
}

TEST_CASE("axis 0 blocks run down the columns") {
  std::vector<float> x = {1, 100, 2, 200, 3, 300, 6, 600};  // 4 x 2, columns (1,2,3,6) and (100,...)
  auto f = parse_scaled("e2m1@4:e8m0");
  auto r = quantize_tensor(*f, x, 4, 2, 0);
  REQUIRE(r.scales.size() == 2);
  CHECK(r.scales[0] == 1.0);
  CHECK(r.scales[1] == 128.0);  // amax 600: floor(log2) 9 - 2 = 7
  CHECK(r.values[0] == 1.0);
  CHECK(r.values[6] == 6.0);
}

TEST_CASE("bad scaled specs are refused") {
  for (const char* s : {"e2m1@1:e8m0", "e2m1@x:e8m0", "e2m1@32:", "e2m1@32:e8m0,rule=weird", "e2m1@32:fp16,rule=mx",
                        "e2m1,zero=uint4", "e2m1@32:fp16,zero=uint4", "e2m1@32:e8m0,sub=3:1", "e2m1@32:e8m0,colour=1",
                        "e2m1@tensor:fp32,rule=mse", "e2m1,scale=-1", "e2m1@32:e8m0,scale=2", "e2m1@32:e8m0,ragged=maybe"}) {
    INFO(s);
    CHECK_THROWS_AS(parse_scaled(s), Error);
  }
  auto f = parse_scaled("e2m1@32:e8m0,ragged=refuse");
  CHECK_THROWS_AS(quantize_tensor(*f, std::vector<float>(40, 1.0f), 1, 40, 1), Error);
  CHECK_NOTHROW(quantize_tensor(*parse_scaled("e2m1@32:e8m0"), std::vector<float>(40, 1.0f), 1, 40, 1));
}

TEST_CASE("scores do not depend on the thread count") {
  std::vector<float> x(64 * 512);
  std::mt19937 rng(3);
  std::normal_distribution<float> nd;
  for (auto& v : x) v = nd(rng);
  const MemorySource src(x, 64, 512);
  std::vector<std::shared_ptr<const ScaledFormat>> fs = {parse_scaled("e2m1@32:e8m0"), parse_scaled("int4@row:fp16"),
                                                        parse_scaled("nf4@64:fp32,scales=e4m3@256:fp32"),
                                                        parse_scaled("int8@tensor:fp32"), parse_scaled("e4m3")};
  ScoreOptions o1, o2;
  o1.threads = 1;
  o2.threads = 2;
  o1.chunk_elements = o2.chunk_elements = 4096;
  const ScoreResult a = score(fs, src, o1), b = score(fs, src, o2);
  REQUIRE(a.rows.size() == b.rows.size());
  for (std::size_t i = 0; i < a.rows.size(); ++i) {
    CHECK(a.rows[i].report.mse == b.rows[i].report.mse);  // bit-identical
    CHECK(a.rows[i].report.entropy_bits == b.rows[i].report.entropy_bits);
    CHECK(a.rows[i].report.mse_stderr == b.rows[i].report.mse_stderr);
  }
  // The streaming score equals a direct computation from quantize_tensor.
  auto qt = quantize_tensor(*fs[0], x, 64, 512, 1);
  double se = 0;
  for (std::size_t i = 0; i < x.size(); ++i) se += (qt.values[i] - x[i]) * (qt.values[i] - x[i]);
  CHECK(a.rows[0].report.mse == doctest::Approx(se / x.size()).epsilon(1e-12));
  CHECK(a.rows[0].report.groups == 64 * 16);
}

TEST_CASE("block-scaled presets expand to their compositions") {
  for (const auto& p : presets()) {
    if (!p.scaled()) continue;
    INFO("preset ", p.name);
    auto f = parse_scaled(p.name);
    CHECK(f->text == parse_scaled(p.spec)->text);
    CHECK_FALSE(p.source.empty());
  }
  CHECK(parse_scaled("mxfp4")->nominal_bits_per_element() == 4.25);
  CHECK(parse_scaled("mxfp8-e4m3")->nominal_bits_per_element() == 8.25);
  CHECK(parse_scaled("shared-exp16-sub2-m7")->nominal_bits_per_element() == 9.0);  // Rouhani et al. 2023: 9 bits
  CHECK(parse_scaled("shared-exp16-sub2-m4")->nominal_bits_per_element() == 6.0);
  CHECK(parse_scaled("shared-exp16-sub2-m2")->nominal_bits_per_element() == 4.0);
  CHECK(parse_scaled("mxfp4,ragged=refuse")->allow_ragged == false);
}

TEST_CASE("the scorer's fused loop gives the same sums as quantize + accumulate") {
  std::vector<float> x(32 * 256);
  std::mt19937 rng(5);
  std::student_t_distribution<float> td(3.0f);
  for (auto& v : x) v = td(rng);
  x[17] = NAN;  // one NaN group
  x[100] = 0.0f;
  const MemorySource src(x, 32, 256);
  std::vector<std::shared_ptr<const ScaledFormat>> fs;
  for (const char* s : {"e2m1@32:e8m0", "int4@32:fp16", "uint4@64:fp16,zero=uint4", "nf4@64:fp16", "e4m3@row:fp32",
                        "int8@tensor:fp32", "e2m1@16:e4m3,tensor-scale=fp32", "e3m2,scale=0.25", "int4@col:bf16",
                        "nf4@64:fp32,scales=e4m3@256:fp32"})
    fs.push_back(parse_scaled(s));
  ScoreOptions a, b;
  a.chunk_elements = b.chunk_elements = 2048;
  b.unfused = true;
  const ScoreResult ra = score(fs, src, a), rb = score(fs, src, b);
  for (std::size_t i = 0; i < fs.size(); ++i) {
    INFO(fs[i]->text);
    const ErrorReport &p = ra.rows[i].report, &q = rb.rows[i].report;
    // Floating sums may be formed in another fixed order (lane partial sums): 1e-12
    // relative; counts, maxima and the code histogram are exact.
    auto close = [](double u, double v) {
      return u == v || std::fabs(u - v) <= 1e-12 * std::max(std::fabs(u), std::fabs(v));
    };
    CHECK(close(p.mse, q.mse));
    CHECK(close(p.mse_stderr, q.mse_stderr));
    CHECK(p.max_abs_err == q.max_abs_err);
    CHECK(close(p.mean_rel_err, q.mean_rel_err));
    CHECK(p.clip_rate == q.clip_rate);
    CHECK(p.zero_rate == q.zero_rate);
    CHECK(close(p.top_mse, q.top_mse));
    CHECK(p.top_n == q.top_n);
    CHECK(p.codes_used == q.codes_used);
    CHECK(p.entropy_bits == q.entropy_bits);
    CHECK(p.nan_groups == q.nan_groups);
    CHECK(p.nonfinite == q.nonfinite);
    CHECK(p.n == q.n);
  }
  CHECK(ra.rows[0].report.nan_groups == 1);
  CHECK(ra.rows[0].report.nonfinite == 1);
  CHECK(ra.rows[0].report.n == x.size() - 32);  // the NaN's group of 32 is left out
}

TEST_CASE("quantize_tensor counts a tensor-wide scale's flags once") {
  // 3 rows of 4: the NaN makes the one tensor group NaN, counted once although every row carries it.
  std::vector<float> x(12, 1.0f);
  x[5] = NAN;
  auto r = quantize_tensor(*parse_scaled("int4@tensor:fp16"), x, 3, 4, 1);
  CHECK(r.groups == 1);
  CHECK(r.nan_groups == 1);
  CHECK(std::isnan(r.scales[0]));
  x[5] = 1e30f;  // beyond fp16: the scale saturates
  r = quantize_tensor(*parse_scaled("int4@tensor:fp16"), x, 3, 4, 1);
  CHECK(r.saturated_groups == 1);
  CHECK(r.nan_groups == 0);
}
