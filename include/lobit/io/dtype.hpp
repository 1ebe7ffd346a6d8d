#pragma once
// Element types of stored tensors (checkpoint files), and their conversion to
// float32 / float64. Conversion is exact for every floating type except f64 to
// float32 (rounded to nearest, ties to even); integers are converted for
// statistics only and are refused for scoring by the callers.
#include <cstddef>
#include <cstdint>
#include <optional>
#include <string_view>

namespace lobit::io {

enum class DType : std::uint8_t {
  f64,
  f32,
  f16,         // IEEE 754 binary16
  bf16,        // bfloat16
  f8_e4m3,     // OCP OFP8 E4M3: bias 7, no infinities, S.1111.111 is NaN
  f8_e5m2,     // OCP OFP8 E5M2: bias 15, IEEE-style infinities and NaNs
  f8_e4m3_nz,  // E4M3, bias 8, no negative zero: 0x80 is the only NaN, no infinities
  f8_e5m2_nz,  // E5M2, bias 16, no negative zero: 0x80 is the only NaN, no infinities
  i8,
  u8,
  i16,
  u16,
  i32,
  u32,
  i64,
  u64,
  boolean,
};

struct DTypeTraits {
  std::string_view name;  // lobit's own name, e.g. "f32", "bf16", "f8-e4m3"
  int bytes;              // bytes per element
  bool floating;
};

const DTypeTraits& traits(DType t);
inline std::string_view dtype_name(DType t) { return traits(t).name; }
inline int dtype_bytes(DType t) { return traits(t).bytes; }
inline bool is_floating(DType t) { return traits(t).floating; }

// lobit's ElementFormat spec with the same values, for floating types of at most
// 16 bits ("fp16", "bf16", "e4m3", ...); empty for others.
std::optional<std::string_view> element_spec(DType t);

// Converts n elements stored at src (little-endian unless big_endian) to float32 / float64.
void decode_to_f32(DType t, const unsigned char* src, std::size_t n, bool big_endian, float* out);
void decode_to_f64(DType t, const unsigned char* src, std::size_t n, bool big_endian, double* out);

}  // namespace lobit::io
