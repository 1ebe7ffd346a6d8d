// The reader-independent checkpoint pieces: element-type decoding, positioned reads,
// all-or-nothing writes, folding N-D tensors to matrices, reduction-axis rules, globs.
#include <doctest/doctest.h>
#include <fmt/format.h>
#include <unistd.h>

#include <bit>
#include <cmath>
#include <cstdint>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <string>
#include <vector>

#include "lobit/error.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/io/axis.hpp"
#include "lobit/io/dtype.hpp"
#include "lobit/io/file.hpp"
#include "lobit/io/tensor_view.hpp"
#include "test_util.hpp"

using namespace lobit;
using namespace lobit::io;

namespace {

std::string temp_path(const std::string& stem) {
  return (std::filesystem::temp_directory_path() / fmt::format("lobit-core-test-{}-{}", ::getpid(), stem)).string();
}

TensorInfo tensor(std::vector<std::uint64_t> shape, bool fortran = false) {
  TensorInfo t;
  t.name = "w";
  t.file = "model";
  t.shape = std::move(shape);
  t.fortran_order = fortran;
  return t;
}

}  // namespace

TEST_CASE("8- and 16-bit float decoding equals the format engine's presets on every code") {
  // The presets carry their sources: OCP OFP8 rev. 1.0 section 5 (e4m3, e5m2), Noune et al.
  // 2022 section 3 (the single-NaN variants), IEEE 754-2019 section 3.6 (binary16).
  for (DType t : {DType::f8_e4m3, DType::f8_e5m2, DType::f8_e4m3_nz, DType::f8_e5m2_nz, DType::f16, DType::bf16}) {
    auto f = parse_element(*element_spec(t));
    const unsigned codes = 1u << (8 * dtype_bytes(t));
    REQUIRE(f->bits() == 8 * dtype_bytes(t));
    std::vector<unsigned char> bytes(codes * static_cast<unsigned>(dtype_bytes(t)));
    for (unsigned c = 0; c < codes; ++c) std::memcpy(&bytes[c * static_cast<unsigned>(dtype_bytes(t))], &c, dtype_bytes(t));
    std::vector<float> out32(codes);
    std::vector<double> out64(codes);
    decode_to_f32(t, bytes.data(), codes, false, out32.data());
    decode_to_f64(t, bytes.data(), codes, false, out64.data());
    int bad = 0;
    for (unsigned c = 0; c < codes; ++c) {
      const double want = f->decode(c);
      bad += !test::same_value(out32[c], want) || !test::same_value(out64[c], want);
    }
    CHECK_MESSAGE(bad == 0, dtype_name(t));
  }
}

TEST_CASE("binary16 decoding equals the compiler's _Float16 on every code") {
  // Reference: GCC's _Float16 (IEEE 754-2019 binary16).
  for (unsigned c = 0; c < 65536; ++c) {
    const std::uint16_t h = static_cast<std::uint16_t>(c);
    _Float16 ref;
    std::memcpy(&ref, &h, 2);
    float got;
    decode_to_f32(DType::f16, reinterpret_cast<const unsigned char*>(&h), 1, false, &got);
    if (std::isnan(static_cast<float>(ref))) {
      REQUIRE(std::isnan(got));
    } else {
      REQUIRE(std::bit_cast<std::uint32_t>(got) == std::bit_cast<std::uint32_t>(static_cast<float>(ref)));
    }
  }
}

TEST_CASE("big-endian elements and integer types decode to their values") {
  const unsigned char be_f32[4] = {0x3f, 0xc0, 0x00, 0x00};  // 1.5 (IEEE 754 binary32, common practice)
  float f;
  decode_to_f32(DType::f32, be_f32, 1, true, &f);
  CHECK(f == 1.5f);
  const unsigned char le_i16[2] = {0xfe, 0xff};  // -2 in two's complement
  double d;
  decode_to_f64(DType::i16, le_i16, 1, false, &d);
  CHECK(d == -2.0);
  decode_to_f64(DType::u16, le_i16, 1, false, &d);
  CHECK(d == 65534.0);
  const unsigned char be_f64[8] = {0xc0, 0x09, 0x21, 0xfb, 0x54, 0x44, 0x2d, 0x18};  // -pi
  decode_to_f64(DType::f64, be_f64, 1, true, &d);
  CHECK(d == -3.141592653589793);
  float f2;
  decode_to_f32(DType::f64, be_f64, 1, true, &f2);
  CHECK(f2 == static_cast<float>(-3.141592653589793));  // nearest float32
}

TEST_CASE("RandomAccessFile reads ranges and names the file when a read passes its end") {
  const std::string p = temp_path("raf");
  { std::ofstream(p, std::ios::binary) << "0123456789"; }
  RandomAccessFile f(p);
  CHECK(f.size() == 10);
  char buf[4];
  f.read_at(6, buf, 4);
  CHECK(std::string(buf, 4) == "6789");
  try {
    f.read_at(8, buf, 4);
    FAIL("no error");
  } catch (const Error& e) {
    CHECK(e.kind() == Error::Kind::usage);
    CHECK(e.message().find(p) != std::string::npos);
    CHECK(e.message().find("passes the end") != std::string::npos);
  }
  CHECK_THROWS_AS(RandomAccessFile(p + ".missing"), Error);
  std::filesystem::remove(p);
}

TEST_CASE("AtomicFileWriter leaves no file unless committed, and refuses an unwritable folder") {
  const std::string p = temp_path("atomic.bin");
  {
    AtomicFileWriter w(p);
    w.write("abc", 3);
    CHECK(!std::filesystem::exists(p));
  }  // not committed: nothing under the final name, no temporary left
  CHECK(!std::filesystem::exists(p));
  for (const auto& e : std::filesystem::directory_iterator(std::filesystem::path(p).parent_path()))
    CHECK(e.path().string().rfind(p, 0) != 0);
  {
    AtomicFileWriter w(p);
    w.write("abcdef", 6);
    w.commit();
  }
  CHECK(std::filesystem::file_size(p) == 6);
  std::filesystem::remove(p);
  CHECK_THROWS_WITH_AS(AtomicFileWriter("/nonexistent-folder-lobit/x.safetensors"),
                       doctest::Contains("cannot write here"), Error);
}

TEST_CASE("ScratchFile appends and reads back") {
  ScratchFile s;
  CHECK(s.append("hello", 5) == 0);
  CHECK(s.append(" world", 6) == 5);
  char buf[11];
  s.read_at(0, buf, 11);
  CHECK(std::string(buf, 11) == "hello world");
  CHECK_THROWS_AS(s.read_at(8, buf, 4), Error);
}

TEST_CASE("fold: reduction axes become the matrix side that blocks run along") {
  {  // a linear weight [out, in], reduced along in: rows are output channels
    auto v = fold(tensor({768, 3072}), {1});
    CHECK(v.rows == 768);
    CHECK(v.cols == 3072);
    CHECK(v.axis == 1);
    CHECK(v.exact);
    CHECK(v.text == "axis 1 of [768, 3072]");
  }
  {  // a MatMul weight [K, N], reduced along K: blocks run down the columns
    auto v = fold(tensor({3072, 768}), {0});
    CHECK(v.rows == 3072);
    CHECK(v.cols == 768);
    CHECK(v.axis == 0);
  }
  {  // a convolution weight [out, in, kh, kw]
    auto v = fold(tensor({64, 32, 3, 3}), {1, 2, 3});
    CHECK(v.rows == 64);
    CHECK(v.cols == 288);
    CHECK(v.axis == 1);
    CHECK(v.text == "axes 1-3 of [64, 32, 3, 3]");
  }
  {  // Fortran order stores the first axis fastest: [768, 3072] is a C-order [3072, 768]
     // in storage, so reducing over axis 1 is the slow end: blocks run down the columns
    auto v = fold(tensor({768, 3072}, true), {1});
    CHECK(v.rows == 3072);
    CHECK(v.cols == 768);
    CHECK(v.axis == 0);
    CHECK(v.text.find("Fortran") != std::string::npos);
  }
  {  // axes of length 1 do not break contiguity
    auto v = fold(tensor({1, 64, 1, 9}), {1, 3});
    CHECK(v.exact);
    CHECK(v.rows * v.cols == 576);
  }
  {  // a transposed convolution [in, out, kh, kw] reduced over in, kh, kw: not contiguous;
     // the larger foldable run (in: 16 elements, against kh, kw: 9) is used and flagged
    auto v = fold(tensor({16, 8, 3, 3}), {0, 2, 3});
    CHECK(!v.exact);
    CHECK(v.reduce == std::vector<int>{0});
    CHECK(v.rows == 16);
    CHECK(v.cols == 72);
    CHECK(v.axis == 0);
    auto w = fold(tensor({4, 8, 3, 3}), {0, 2, 3});  // now kh, kw (9) is the larger run
    CHECK(w.reduce == std::vector<int>{2, 3});
    CHECK(w.cols == 9);
    CHECK(w.axis == 1);
  }
  {
    auto v = fold(tensor({5}), {0});
    CHECK(v.rows == 1);
    CHECK(v.cols == 5);
  }
  CHECK_THROWS_AS(fold(tensor({4, 4}), {2}), Error);
}

TEST_CASE("choose_axes: a rule, then the file's hint, then the default by rank") {
  TensorInfo lin = tensor({10, 20});
  auto c = choose_axes(lin, {});
  CHECK(c.reduce == std::vector<int>{1});
  CHECK(c.assumed);
  lin.axis_hint = AxisHint{{0}, "MatMul 'mm' input B [K, N]"};
  c = choose_axes(lin, {});
  CHECK(c.reduce == std::vector<int>{0});
  CHECK(!c.assumed);
  CHECK(c.reason.find("MatMul") != std::string::npos);
  c = choose_axes(lin, {parse_axis_rule("w=last")});
  CHECK(c.reduce == std::vector<int>{1});
  CHECK(c.reason == "rule 'w=last'");
  CHECK(choose_axes(tensor({2, 3, 4, 5}), {}).reduce == std::vector<int>{1, 2, 3});
  CHECK(choose_axes(tensor({2, 3, 4, 5}), {parse_axis_rule("*=1-2,-1")}).reduce == std::vector<int>{1, 2, 3});
  CHECK(choose_axes(tensor({7}), {}).reduce == std::vector<int>{0});
  CHECK_THROWS_WITH_AS(choose_axes(tensor({2, 3}), {parse_axis_rule("w=2")}), doctest::Contains("has no axis 2"),
                       Error);
  // A rule is checked for its spelling when parsed and for its axes against each tensor
  // it matches: axis 20 is a fine rule, and an error only for a tensor it matches.
  CHECK_NOTHROW(parse_axis_rule("big*=20"));
  CHECK_NOTHROW(parse_axis_rule("w=-3--1"));
  CHECK(choose_axes(tensor({2, 3, 4}), {parse_axis_rule("w=-3--2")}).reduce == std::vector<int>{0, 1});
  CHECK(choose_axes(tensor({2, 3}), {parse_axis_rule("big*=20")}).assumed);  // no match: the default
  CHECK_THROWS_WITH_AS(choose_axes(tensor({2, 3}), {parse_axis_rule("w=-1--2")}), doctest::Contains("backwards"),
                       Error);
  CHECK_THROWS_AS(parse_axis_rule("noequals"), Error);
  CHECK_THROWS_AS(parse_axis_rule("w=x"), Error);
  CHECK_THROWS_AS(parse_axis_rule("w=3-1"), Error);
}

TEST_CASE("glob_match") {
  CHECK(glob_match("*", "anything.at/all"));
  CHECK(glob_match("layers.*.weight", "layers.0.attn.weight"));
  CHECK(!glob_match("layers.*.weight", "layers.0.attn.bias"));
  CHECK(glob_match("conv?", "conv1"));
  CHECK(!glob_match("conv?", "conv12"));
  CHECK(glob_match("conv[0-9]*", "conv3.w"));
  CHECK(!glob_match("conv[!0-9]*", "conv3.w"));
  CHECK(glob_match("a*b*c", "a__b__b__c"));
  CHECK(!glob_match("a*b*c", "a__b__b__"));
  CHECK(glob_match("", ""));
  CHECK(!glob_match("", "x"));
  CHECK(glob_match("[ab", "[ab"));  // an unclosed set is literal
}
