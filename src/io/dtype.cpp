// Stored element types -> float32 / float64. The 8- and 16-bit float decoders are
// written out here (not taken from the format engine) so that lobit_io stands alone
// for the fuzz build; tests/io/dtype_test.cpp checks every code against the engine's
// presets and against _Float16.
#include "lobit/io/dtype.hpp"

#include <array>
#include <bit>
#include <cmath>
#include <cstring>
#include <limits>

namespace lobit::io {
namespace {

constexpr std::array<DTypeTraits, 17> kTraits{{
    {"f64", 8, true},      {"f32", 4, true},      {"f16", 2, true},        {"bf16", 2, true},
    {"f8-e4m3", 1, true},  {"f8-e5m2", 1, true},  {"f8-e4m3-nz", 1, true}, {"f8-e5m2-nz", 1, true},
    {"i8", 1, false},      {"u8", 1, false},      {"i16", 2, false},       {"u16", 2, false},
    {"i32", 4, false},     {"u32", 4, false},     {"i64", 8, false},       {"u64", 8, false},
    {"bool", 1, false},
}};

enum class Special { ieee, top_nan, negzero_nan };

// Value of a sign/exponent/mantissa code with subnormals (exact in binary64).
double minifloat_value(unsigned code, int e_bits, int m_bits, int bias, Special special) {
  const unsigned m_mask = (1u << m_bits) - 1, e_mask = (1u << e_bits) - 1;
  const bool neg = (code >> (e_bits + m_bits)) & 1u;
  const unsigned e = (code >> m_bits) & e_mask, m = code & m_mask;
  const double nan = std::numeric_limits<double>::quiet_NaN();
  if (special == Special::negzero_nan && neg && e == 0 && m == 0) return nan;
  if (special == Special::top_nan && e == e_mask && m == m_mask) return nan;
  if (special == Special::ieee && e == e_mask) {
    if (m != 0) return nan;
    return neg ? -std::numeric_limits<double>::infinity() : std::numeric_limits<double>::infinity();
  }
  double mag = e == 0 ? std::ldexp(static_cast<double>(m), 1 - bias - m_bits)
                      : std::ldexp(static_cast<double>(m | (1u << m_bits)), static_cast<int>(e) - bias - m_bits);
  return neg ? -mag : mag;
}

struct Tables {
  std::array<float, 256> e4m3, e5m2, e4m3_nz, e5m2_nz;
  Tables() {
    for (unsigned c = 0; c < 256; ++c) {
      e4m3[c] = static_cast<float>(minifloat_value(c, 4, 3, 7, Special::top_nan));
      e5m2[c] = static_cast<float>(minifloat_value(c, 5, 2, 15, Special::ieee));
      e4m3_nz[c] = static_cast<float>(minifloat_value(c, 4, 3, 8, Special::negzero_nan));
      e5m2_nz[c] = static_cast<float>(minifloat_value(c, 5, 2, 16, Special::negzero_nan));
    }
  }
};
const Tables& tables() {
  static const Tables t;
  return t;
}

template <class U>
U load(const unsigned char* p, bool big_endian) {
  U v;
  std::memcpy(&v, p, sizeof v);
  if (big_endian) {  // this build targets little-endian hosts (checked below)
    if constexpr (sizeof(U) == 2) v = __builtin_bswap16(v);
    if constexpr (sizeof(U) == 4) v = __builtin_bswap32(v);
    if constexpr (sizeof(U) == 8) v = __builtin_bswap64(v);
  }
  return v;
}
static_assert(std::endian::native == std::endian::little, "lobit_io assumes a little-endian host");

float half_to_float(std::uint16_t h) {
  const std::uint32_t sign = static_cast<std::uint32_t>(h & 0x8000u) << 16;
  const unsigned e = (h >> 10) & 0x1f, m = h & 0x3ff;
  std::uint32_t bits;
  if (e == 0x1f) {
    bits = sign | 0x7f800000u | (static_cast<std::uint32_t>(m) << 13);  // inf, NaN (payload kept)
  } else if (e == 0) {
    // Subnormal or zero: exact as m * 2^-24.
    const float mag = std::ldexp(static_cast<float>(m), -24);
    bits = std::bit_cast<std::uint32_t>(mag) | sign;
  } else {
    bits = sign | ((e + 112u) << 23) | (static_cast<std::uint32_t>(m) << 13);
  }
  return std::bit_cast<float>(bits);
}

// out[i] = f(element i): one loop per element type, chosen once per call.
template <class T, class F>
void each(const unsigned char* src, std::size_t n, std::size_t width, T* out, F f) {
  for (std::size_t i = 0; i < n; ++i) out[i] = static_cast<T>(f(src + i * width));
}

template <class T>
void decode(DType t, const unsigned char* src, std::size_t n, bool be, T* out) {
  const Tables& tb = tables();
  const std::size_t w = static_cast<std::size_t>(dtype_bytes(t));
  switch (t) {
    case DType::f64: return each(src, n, w, out, [&](auto p) { return std::bit_cast<double>(load<std::uint64_t>(p, be)); });
    case DType::f32: return each(src, n, w, out, [&](auto p) { return std::bit_cast<float>(load<std::uint32_t>(p, be)); });
    case DType::f16: return each(src, n, w, out, [&](auto p) { return half_to_float(load<std::uint16_t>(p, be)); });
    case DType::bf16:
      return each(src, n, w, out, [&](auto p) {
        return std::bit_cast<float>(static_cast<std::uint32_t>(load<std::uint16_t>(p, be)) << 16);
      });
    case DType::f8_e4m3: return each(src, n, w, out, [&](auto p) { return tb.e4m3[*p]; });
    case DType::f8_e5m2: return each(src, n, w, out, [&](auto p) { return tb.e5m2[*p]; });
    case DType::f8_e4m3_nz: return each(src, n, w, out, [&](auto p) { return tb.e4m3_nz[*p]; });
    case DType::f8_e5m2_nz: return each(src, n, w, out, [&](auto p) { return tb.e5m2_nz[*p]; });
    case DType::i8: return each(src, n, w, out, [](auto p) { return static_cast<std::int8_t>(*p); });
    case DType::u8: return each(src, n, w, out, [](auto p) { return *p; });
    case DType::boolean: return each(src, n, w, out, [](auto p) { return *p != 0; });
    case DType::i16:
      return each(src, n, w, out, [&](auto p) { return static_cast<std::int16_t>(load<std::uint16_t>(p, be)); });
    case DType::u16: return each(src, n, w, out, [&](auto p) { return load<std::uint16_t>(p, be); });
    case DType::i32:
      return each(src, n, w, out, [&](auto p) { return static_cast<std::int32_t>(load<std::uint32_t>(p, be)); });
    case DType::u32: return each(src, n, w, out, [&](auto p) { return load<std::uint32_t>(p, be); });
    case DType::i64:
      return each(src, n, w, out, [&](auto p) { return static_cast<std::int64_t>(load<std::uint64_t>(p, be)); });
    case DType::u64: return each(src, n, w, out, [&](auto p) { return load<std::uint64_t>(p, be); });
  }
  each(src, n, w, out, [](auto) { return std::numeric_limits<T>::quiet_NaN(); });
}

}  // namespace

const DTypeTraits& traits(DType t) { return kTraits[static_cast<std::size_t>(t)]; }

std::optional<std::string_view> element_spec(DType t) {
  switch (t) {
    case DType::f16: return "fp16";
    case DType::bf16: return "bf16";
    case DType::f8_e4m3: return "e4m3";
    case DType::f8_e5m2: return "e5m2";
    case DType::f8_e4m3_nz: return "e4m3-single-nan";
    case DType::f8_e5m2_nz: return "e5m2-single-nan";
    default: return std::nullopt;
  }
}

void decode_to_f32(DType t, const unsigned char* src, std::size_t n, bool big_endian, float* out) {
  if (t == DType::f32 && !big_endian) {
    std::memcpy(out, src, n * 4);
    return;
  }
  decode(t, src, n, big_endian, out);
}

void decode_to_f64(DType t, const unsigned char* src, std::size_t n, bool big_endian, double* out) {
  decode(t, src, n, big_endian, out);
}

}  // namespace lobit::io
