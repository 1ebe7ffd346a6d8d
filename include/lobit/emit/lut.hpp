#pragma once
// Kernel code generation: lookup tables, an exact encoder and bit packing for
// an element format of up to 16 bits, as a C99, C++17 or CUDA header, or as
// data-only JSON / CSV. The generated encoder reproduces
// ElementFormat::encode(double(x), Rounding::nearest_even, overflow) for every
// float32 x, bit for bit (tests/emit compile and run it).
//
// How the generated encoder decides: every decision threshold of the format
// (ValueTable: the exact midpoints between neighbouring values, plus the
// overflow midpoints beyond +-max) becomes the smallest float32 that goes to
// the upper side of it, ties included. A float32 is then compared through its
// order key (bits for x >= 0, -(bits & 0x7fffffff) for x < 0: integers that
// order like the floats, with -0 and +0 equal), so the encoder needs no float
// arithmetic and does not depend on flush-to-zero settings. The slot index (the
// number of thresholds at or below x) picks the code; a negative input that
// rounds to zero gets the negative-zero code where the format has one.
#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "lobit/format/element_format.hpp"
#include "lobit/format/value_table.hpp"

namespace lobit {
struct ScaledFormat;
}

namespace lobit::emit {

enum class LutLanguage { c, cpp, cuda, json, csv };
enum class DecodeType { f32, f16, bf16, scaled_int };  // scaled_int: value = k * 2^E (C, C++, CUDA)
enum class PackOrder { lo_first, hi_first };

std::optional<LutLanguage> parse_lut_language(std::string_view name);
std::optional<DecodeType> parse_decode_type(std::string_view name);
std::optional<PackOrder> parse_pack_order(std::string_view name);
std::string_view to_string(LutLanguage l);
std::string_view to_string(DecodeType t);
std::string_view to_string(PackOrder p);

struct LutOptions {
  LutLanguage language = LutLanguage::c;
  DecodeType decode_type = DecodeType::f32;
  bool allow_inexact = false;             // emit a decode table that rounds some values (error stated)
  std::string cpp_namespace = "lobit_gen";  // cpp and cuda; may be nested (a::b)
  PackOrder pack = PackOrder::lo_first;   // 2-, 4- and 6-bit codes
  Overflow overflow = Overflow::format_default;
  bool stochastic = false;  // also emit lobit_<stem>_encode_stochastic(x, random_word) (C, C++, CUDA)
  std::string stem;     // identifiers are lobit_<stem>_...; empty: derived from `title`
  std::string title;    // how the user named the format (empty: its canonical spec)
  std::string command;  // the command recorded in the header comment
};

// A valid identifier fragment from format text: lower-case letters, digits and
// single underscores ("float+exp=3+man=2" -> "float_exp_3_man_2").
std::string lut_identifier_stem(std::string_view text);

// Order key of a float32 bit pattern (see above); NaN patterns are not keys.
constexpr std::int32_t float32_order_key(std::uint32_t bits) {
  const auto m = static_cast<std::int32_t>(bits & 0x7fffffffu);
  return (bits >> 31) ? -m : m;
}

// One decision threshold of the generated encoder.
struct LutThreshold {
  double below = 0, above = 0;  // the neighbouring values (above may be a virtual value past max)
  Threshold exact;              // exact position and tie side (from ValueTable)
  bool overflow = false;        // an overflow midpoint beyond +max or -max
  std::uint32_t up_from_bits = 0;  // smallest float32 (bits; +inf if none) that goes above it
};

// Everything the encoder needs, derived from the library.
struct LutEncodePlan {
  Overflow overflow = Overflow::saturate;  // resolved
  std::vector<LutThreshold> thresholds;    // ascending
  std::vector<Code> slot_codes;            // thresholds.size() + 1 results
  std::optional<std::size_t> zero_slot;    // slot of the value 0
  std::optional<Code> negative_zero_code;  // where the format has one
  Code nan_result = 0;
  bool nan_from_library = false;  // false: the format has no NaN code and the library refuses NaN;
                                  // the generated encoder then returns the code +0.0 encodes to.0
  Code pos_inf_result = 0, neg_inf_result = 0;
};

// Throws lobit::Error (usage) for a format of more than 16 bits.
LutEncodePlan plan_encode(const ElementFormat& f, Overflow overflow);

// Decode table entries in the chosen type (float32: 32-bit patterns; fp16/bf16:
// 16-bit patterns) and whether each finite value is exact in it.
struct DecodeTable {
  DecodeType type = DecodeType::f32;
  std::vector<std::uint32_t> bits;  // per code
  bool exact = true;                // every finite value exact (no overflow to infinity)
  double max_abs_error = 0;         // over finite values (inf where one overflows)
  double max_rel_error = 0;
  std::optional<Code> worst_code;
};
DecodeTable decode_table(const ElementFormat& f, DecodeType type);

// Scaled-integer decode (--decode-type int): every finite value is k * 2^exponent
// with integer k in the narrowest of int8/16/32 (uint8/16/32 where no value is
// negative). NaN, infinity and unused codes hold k = 0 and number = false.
// Throws lobit::Error (usage) where no such table exists.
struct ScaledIntTable {
  int exponent = 0;
  int type_bits = 8;
  bool is_signed = true;
  std::vector<std::int64_t> k;  // per code
  std::vector<bool> number;     // per code: a finite value
};
ScaledIntTable scaled_int_table(const ElementFormat& f);

// What the stochastic encoder needs (the library's ValueTable definition, which the
// arithmetic encoders of minifloats and integers agree with bit for bit):
// values[i] sorted with their codes; beyond +-max the virtual neighbours the
// format defines, and the codes an overflow gives (library: encode of the virtual
// neighbour itself under stochastic rounding).
struct LutStochasticPlan {
  std::vector<double> values;
  std::vector<Code> codes;
  std::optional<double> upper_virtual, lower_virtual;  // only where a float32 can lie past that end
  Code upper_overflow_code = 0, lower_overflow_code = 0;
  std::optional<std::size_t> zero_index;
  std::optional<Code> negative_zero_code;
  Code nan_result = 0;
  bool nan_from_library = false;
  Code pos_inf_result = 0, neg_inf_result = 0;
};
LutStochasticPlan plan_stochastic(const ElementFormat& f, Overflow overflow);

// The generated text. Throws lobit::Error (usage) for a format of more than 16
// bits, an inexact decode type without allow_inexact, a bad namespace.
std::string emit_lut(const ElementFormat& f, const LutOptions& options);

// A block-scaled format ELEMENT@K:SCALE (plain block scaling; 2-, 4-, 6- or 8-bit
// elements, a scale of at most 16 bits, both exact in float32): the element's
// header plus the scale's decode table, the block's byte layout as a struct and
// a dequantize-block function equal to float32(lobit::quantize_tensor's values).
// C, C++ and CUDA only. Throws lobit::Error (usage) for anything else.
std::string emit_block_lut(const ScaledFormat& sf, const LutOptions& options);

// Product tables for a pair of formats of at most 4 bits each (lookup-based multiply
// kernels): entry (ca << bits(b)) | cb is decode_a(ca) * decode_b(cb), exact, as
// float32 bits (refused where float32 cannot hold a product), and, where every
// product is finite, as integers k with product = k * 2^exponent plus the
// accumulator width a sum of N of them needs. C, C++ and CUDA; json and csv give the
// same entries as data (index, codes, exact value, float32 bits, k).
struct ProductTable {
  int bits_a = 0, bits_b = 0;
  std::vector<std::uint32_t> f32_bits;  // 2^(bits_a + bits_b) entries
  bool integer = false;                 // every product finite and k fits in 32 bits
  std::vector<std::int64_t> k;          // product = k * 2^exponent
  int exponent = 0;
  int product_bits = 0;                 // two's complement bits that hold every k
};
ProductTable product_table(const ElementFormat& a, const ElementFormat& b);
std::string emit_product_lut(const ElementFormat& a, const ElementFormat& b, const LutOptions& options);

}  // namespace lobit::emit
