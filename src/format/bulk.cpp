#include "lobit/format/bulk.hpp"

#include <array>
#include <bit>
#include <vector>
#include <fmt/format.h>

#include "lobit/error.hpp"
#include "lobit/format/integer.hpp"
#include "lobit/format/minifloat.hpp"

namespace lobit {

namespace {
void check_sizes(std::size_t a, std::size_t b) {
  if (a != b)
    throw Error(Error::Kind::usage, fmt::format("input has {} elements, output {}", a, b), "encode/decode",
                "pass spans of equal length");
}

template <class Fmt, class In, class Convert>
void encode_loop(const Fmt& f, std::span<const In> in, std::span<Code> out, const EncodeOptions& o, Convert conv) {
  const bool sr = o.rounding == Rounding::stochastic;
  for (std::size_t i = 0; i < in.size(); ++i) {
    const std::uint32_t w = sr ? stochastic_word(o.seed, o.first_index + i) : 0;
    out[i] = f.encode(conv(in[i]), o.rounding, o.overflow, w);
  }
}

// Calls the concrete (final) encoder directly where the family is known.
template <class In, class Convert>
void dispatch(const ElementFormat& f, std::span<const In> in, std::span<Code> out, const EncodeOptions& o,
              Convert conv) {
  check_sizes(in.size(), out.size());
  if (auto* m = dynamic_cast<const Minifloat*>(&f)) return encode_loop(*m, in, out, o, conv);
  if (auto* n = dynamic_cast<const Integer*>(&f)) return encode_loop(*n, in, out, o, conv);
  encode_loop(f, in, out, o, conv);
}

const std::array<double, 65536>& fp16_table() {
  static const auto table = [] {
    std::array<double, 65536> t{};
    const Minifloat h({.exp_bits = 5, .man_bits = 10, .bias = 15, .special = SpecialValues::ieee});
    for (std::uint32_t c = 0; c < 65536; ++c) t[c] = h.decode(c);
    return t;
  }();
  return table;
}
}  // namespace

double half_bits_to_double(std::uint16_t bits, HalfKind kind) {
  if (kind == HalfKind::bf16) return static_cast<double>(std::bit_cast<float>(std::uint32_t{bits} << 16));
  const double v = fp16_table()[bits];
  if (std::isnan(v)) return std::bit_cast<double>(std::uint64_t{0x7ff8000000000000ull} | (std::uint64_t{bits & 0x8000u} << 48));
  return v;
}

void encode(const ElementFormat& f, std::span<const double> in, std::span<Code> out, const EncodeOptions& o) {
  dispatch(f, in, out, o, [](double x) { return x; });
}
void encode(const ElementFormat& f, std::span<const float> in, std::span<Code> out, const EncodeOptions& o) {
  dispatch(f, in, out, o, [](float x) { return static_cast<double>(x); });
}
void encode(const ElementFormat& f, std::span<const std::uint16_t> in, HalfKind kind, std::span<Code> out,
            const EncodeOptions& o) {
  if (kind == HalfKind::fp16) {
    const auto& t = fp16_table();
    dispatch(f, in, out, o, [&t](std::uint16_t b) { return t[b]; });
  } else {
    dispatch(f, in, out, o, [](std::uint16_t b) { return half_bits_to_double(b, HalfKind::bf16); });
  }
}

namespace {
// Decoding through a table of every code (formats up to 16 bits); codes are
// range-checked once per element against the table size.
template <class T>
void decode_loop(const ElementFormat& f, std::span<const Code> in, std::span<T> out) {
  check_sizes(in.size(), out.size());
  if (f.bits() > 16 || in.size() < (std::size_t{1} << f.bits())) {
    for (std::size_t i = 0; i < in.size(); ++i) out[i] = static_cast<T>(f.decode(in[i]));
    return;
  }
  std::vector<T> table(std::size_t{1} << f.bits());
  for (std::size_t c = 0; c < table.size(); ++c) table[c] = static_cast<T>(f.decode(c));
  for (std::size_t i = 0; i < in.size(); ++i) {
    if (in[i] >= table.size()) f.decode(in[i]);  // throws the out-of-range error
    out[i] = table[in[i]];
  }
}
}  // namespace

void decode(const ElementFormat& f, std::span<const Code> in, std::span<double> out) { decode_loop(f, in, out); }
void decode(const ElementFormat& f, std::span<const Code> in, std::span<float> out) { decode_loop(f, in, out); }

}  // namespace lobit
