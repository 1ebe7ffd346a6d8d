// Every binary32 bit pattern encoded to fp16 and bf16 (nearest-even, the
// formats' default overflow policy, i.e. infinity), compared code for code with
// two outside conversions; and every 16-bit code decoded, compared value for
// value. NaNs are compared by class only: the references keep or drop the sign
// and payload in their own ways, lobit returns its one canonical NaN code.
//
// Two threads, about half a minute per 2^32 sweep in a Release build.
#include <doctest/doctest.h>

#include <Eigen/Core>
#include <array>
#include <bit>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstring>
#include <memory>
#include <span>
#include <string>
#include <thread>
#include <vector>

#include "lobit/format/bulk.hpp"
#include "lobit/format/minifloat.hpp"
#include "lobit/format/spec.hpp"
#include "test_util.hpp"

namespace {

using lobit::Code;
using lobit::Minifloat;
using lobit::test::same_value;

// Mismatches of one comparison: a count and the first few inputs.
struct Tally {
  std::uint64_t count = 0;
  std::vector<std::string> first;

  void note(std::uint32_t input, Code lib, std::uint32_t ref) {
    if (++count > 5) return;
    char buf[96];
    std::snprintf(buf, sizeof buf, "input 0x%08x: lobit 0x%04llx, reference 0x%04x", input,
                  static_cast<unsigned long long>(lib), ref);
    first.emplace_back(buf);
  }
  void merge(const Tally& o) {
    count += o.count;
    for (const auto& s : o.first)
      if (first.size() < 5) first.push_back(s);
  }
  std::string report() const {
    std::string r = std::to_string(count) + " mismatches";
    for (const auto& s : first) r += "\n  " + s;
    return r;
  }
};

// check(bits, tallies) on every 32-bit pattern, split over two threads; the
// first mismatches listed are the lowest patterns.
template <std::size_t N, class Check>
std::array<Tally, N> over_every_float32(const Check& check) {
  constexpr int threads = 2;
  std::array<std::array<Tally, N>, threads> part;
  std::vector<std::thread> pool;
  constexpr std::uint64_t total = std::uint64_t{1} << 32;
  for (int t = 0; t < threads; ++t) {
    pool.emplace_back([&, t] {
      const std::uint64_t lo = total / threads * t, hi = total / threads * (t + 1);
      for (std::uint64_t u = lo; u < hi; ++u) check(static_cast<std::uint32_t>(u), part[t]);
    });
  }
  for (auto& th : pool) th.join();
  std::array<Tally, N> all;
  for (int t = 0; t < threads; ++t)
    for (std::size_t i = 0; i < N; ++i) all[i].merge(part[t][i]);
  return all;
}

// NaN in a 16-bit IEEE-style pattern with E exponent bits: all-ones exponent,
// non-zero mantissa (IEEE 754-2019 section 3.4; bfloat16 is binary32's upper half).
constexpr bool fp16_is_nan(std::uint32_t c) { return (c & 0x7c00u) == 0x7c00u && (c & 0x03ffu) != 0; }
constexpr bool bf16_is_nan(std::uint32_t c) { return (c & 0x7f80u) == 0x7f80u && (c & 0x007fu) != 0; }

const Minifloat& preset_minifloat(const char* name) {
  static std::vector<std::shared_ptr<const lobit::ElementFormat>> keep;
  keep.push_back(lobit::parse_element(name));
  const auto* m = dynamic_cast<const Minifloat*>(keep.back().get());
  REQUIRE_MESSAGE(m != nullptr, name, " is not a minifloat");
  return *m;
}

// The compiler's float -> _Float16 conversion. GCC 12 on x86-64 has two: a call
// to libgcc's soft-float __truncsfhf2 for the baseline ISA, which raises the
// IEEE exception flags through the x87 environment and costs ~60 ns a value
// (over two minutes for 2^32 values on two cores), and the F16C instruction
// VCVTPS2PH (immediate 4: the MXCSR rounding direction, round-to-nearest-even
// by default) in code compiled for F16C, ~1 ns. The test uses the second where
// the CPU has F16C and the first otherwise.
__attribute__((target("f16c"), noinline)) std::uint16_t float_to_float16_f16c(float x) {
  const _Float16 h = static_cast<_Float16>(x);
  std::uint16_t bits;
  std::memcpy(&bits, &h, sizeof bits);
  return bits;
}
__attribute__((noinline)) std::uint16_t float_to_float16_libgcc(float x) {
  return std::bit_cast<std::uint16_t>(static_cast<_Float16>(x));
}
bool cpu_has_f16c() { return __builtin_cpu_supports("f16c"); }

bool same_code(Code lib, std::uint32_t ref, bool (*is_nan)(std::uint32_t)) {
  if (is_nan(ref)) return lib <= 0xffff && is_nan(static_cast<std::uint32_t>(lib));
  return lib == ref;
}

}  // namespace

TEST_CASE("every float32 encodes to fp16 as the compiler's _Float16 and Eigen::half convert it") {
  const Minifloat& fp16 = preset_minifloat("fp16");
  REQUIRE(fp16.bits() == 16);
  const bool f16c = cpu_has_f16c();
  MESSAGE("_Float16 conversion: ", std::string(f16c ? "F16C VCVTPS2PH" : "libgcc __truncsfhf2 (slow)"));
  const auto to_float16 = f16c ? float_to_float16_f16c : float_to_float16_libgcc;
  const auto tallies = over_every_float32<2>([&fp16, to_float16](std::uint32_t u, std::array<Tally, 2>& t) {
    const float x = std::bit_cast<float>(u);
    const Code lib = fp16.encode(static_cast<double>(x));
    // reference: the compiler's float -> _Float16 conversion (GCC 12, ISO/IEC TS
    // 18661-3; IEEE 754-2019 section 5.4.2 convertFormat under section 4.3.1
    // roundTiesToEven, overflow to infinity per section 7.4).
    const std::uint16_t gcc = to_float16(x);
    if (!same_code(lib, gcc, [](std::uint32_t c) { return fp16_is_nan(c); })) t[0].note(u, lib, gcc);
    // reference: Eigen 3.4 Eigen::half(float), float_to_half_rtne (round to
    // nearest even; NaN becomes 0x7e00).
    const auto eigen = Eigen::numext::bit_cast<std::uint16_t>(Eigen::half(x));
    if (!same_code(lib, eigen, [](std::uint32_t c) { return fp16_is_nan(c); })) t[1].note(u, lib, eigen);
  });
  CHECK_MESSAGE(tallies[0].count == 0, "fp16 vs _Float16: ", tallies[0].report());
  CHECK_MESSAGE(tallies[1].count == 0, "fp16 vs Eigen::half: ", tallies[1].report());
}

TEST_CASE("every float32 encodes to bf16 as Eigen::bfloat16 converts it") {
  const Minifloat& bf16 = preset_minifloat("bf16");
  REQUIRE(bf16.bits() == 16);
  const auto tallies = over_every_float32<1>([&bf16](std::uint32_t u, std::array<Tally, 1>& t) {
    const float x = std::bit_cast<float>(u);
    const Code lib = bf16.encode(static_cast<double>(x));
    // reference: Eigen 3.4 Eigen::bfloat16(float), float_to_bfloat16_rtne<false>:
    // round to nearest even on the bit pattern (adds 0x7fff plus the kept lsb),
    // subnormals kept, overflow to infinity; NaN becomes +-0x7fc0.
    const auto eigen = Eigen::numext::bit_cast<std::uint16_t>(Eigen::bfloat16(x));
    if (!same_code(lib, eigen, [](std::uint32_t c) { return bf16_is_nan(c); })) t[0].note(u, lib, eigen);
  });
  CHECK_MESSAGE(tallies[0].count == 0, "bf16 vs Eigen::bfloat16: ", tallies[0].report());
}

TEST_CASE("every fp16 and bf16 code decodes to the float32 value the references give it") {
  const Minifloat& fp16 = preset_minifloat("fp16");
  const Minifloat& bf16 = preset_minifloat("bf16");
  std::vector<Code> codes(65536);
  for (std::uint32_t c = 0; c < 65536; ++c) codes[c] = c;
  std::vector<float> fp16_bulk(65536), bf16_bulk(65536);
  lobit::decode(fp16, std::span<const Code>(codes), std::span<float>(fp16_bulk));
  lobit::decode(bf16, std::span<const Code>(codes), std::span<float>(bf16_bulk));

  Tally fp16_gcc, fp16_eigen, fp16_span, bf16_eigen, bf16_span;
  auto as_bits = [](float f) { return std::bit_cast<std::uint32_t>(f); };
  for (std::uint32_t c = 0; c < 65536; ++c) {
    const auto h = static_cast<std::uint16_t>(c);
    // reference: the compiler's _Float16 -> float conversion (exact, IEEE 754-2019 section 5.4.2).
    const float gcc = static_cast<float>(std::bit_cast<_Float16>(h));
    // reference: Eigen 3.4 half_to_float.
    const float eigen_h = static_cast<float>(Eigen::numext::bit_cast<Eigen::half>(h));
    const double lib_h = fp16.decode(c);
    if (!same_value(lib_h, gcc)) fp16_gcc.note(c, as_bits(static_cast<float>(lib_h)), as_bits(gcc));
    if (!same_value(lib_h, eigen_h)) fp16_eigen.note(c, as_bits(static_cast<float>(lib_h)), as_bits(eigen_h));
    if (!same_value(fp16_bulk[c], gcc)) fp16_span.note(c, as_bits(fp16_bulk[c]), as_bits(gcc));

    // reference: Eigen 3.4 bfloat16_to_float (the 16 bits become binary32's upper half).
    const float eigen_b = static_cast<float>(Eigen::numext::bit_cast<Eigen::bfloat16>(h));
    const double lib_b = bf16.decode(c);
    if (!same_value(lib_b, eigen_b)) bf16_eigen.note(c, as_bits(static_cast<float>(lib_b)), as_bits(eigen_b));
    if (!same_value(bf16_bulk[c], eigen_b)) bf16_span.note(c, as_bits(bf16_bulk[c]), as_bits(eigen_b));
  }
  CHECK_MESSAGE(fp16_gcc.count == 0, "fp16 decode vs _Float16: ", fp16_gcc.report());
  CHECK_MESSAGE(fp16_eigen.count == 0, "fp16 decode vs Eigen::half: ", fp16_eigen.report());
  CHECK_MESSAGE(fp16_span.count == 0, "fp16 span decode vs _Float16: ", fp16_span.report());
  CHECK_MESSAGE(bf16_eigen.count == 0, "bf16 decode vs Eigen::bfloat16: ", bf16_eigen.report());
  CHECK_MESSAGE(bf16_span.count == 0, "bf16 span decode vs Eigen::bfloat16: ", bf16_span.report());
}
