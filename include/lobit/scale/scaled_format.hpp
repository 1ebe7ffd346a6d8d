#pragma once
// Scaled formats: an element format composed with a scaling scheme.
//
//   scaled  := element ['@' group [':' scale]] (',' option)*
//   group   := k (a block of k >= 2 elements along the reduction axis) | row | col | tensor
//   options := rule=mx|absmax|noclip|mse   how a group's scale is chosen
//              tensor-scale=FMT             two-level: block scales times one per-tensor scale
//              zero=FMT                     affine integer groups, x ~ s * (q - z)
//              scales=SCALED                the scales themselves quantized in blocks
//              sub=K2:D2                    shared micro-exponents: K2-element sub-blocks with D2-bit offsets
//              scale=X                      a fixed scale for a bare element (no group)
//              ragged=allow|refuse          a last block shorter than k (default allow)
#include <memory>
#include <optional>
#include <string>

#include "lobit/format/element_format.hpp"

namespace lobit {

enum class Granularity { fixed, tensor, row, col, block };
enum class ScaleRule {
  mx,      // OCP Microscaling: 2^(floor(log2 amax) - emax(element)), clamped to the scale format
  absmax,  // amax / max(element), rounded to nearest in the scale format
  noclip,  // amax / max(element), rounded up in the scale format: nothing clips
  mse      // the clipping ratio (of absmax) with the least squared error in the group
};
std::string_view to_string(Granularity g);
std::string_view to_string(ScaleRule r);

struct ScaledFormat {
  std::string text;  // canonical spec
  std::shared_ptr<const ElementFormat> element;
  Granularity granularity = Granularity::fixed;
  int block = 0;                                   // for Granularity::block
  std::shared_ptr<const ElementFormat> scale;      // how a group scale is stored (null: fixed)
  ScaleRule rule = ScaleRule::absmax;
  double fixed_scale = 1.0;                        // Granularity::fixed
  std::shared_ptr<const ElementFormat> tensor_scale;  // two-level: the per-tensor scale format
  std::shared_ptr<const ElementFormat> zero;       // affine: the zero-point format (null: symmetric)
  std::shared_ptr<const ScaledFormat> scales;      // double quantization of the group scales
  int sub_block = 0, sub_bits = 0;                 // shared micro-exponents
  bool allow_ragged = true;

  // Derived at parse time: the format codes are stored in (for affine groups
  // the unsigned integer of the element's width), its largest magnitude reachable
  // with either sign, and a table encoder where one is exact.
  std::shared_ptr<const ElementFormat> code_element;
  double element_max_value = 0;
  std::shared_ptr<const class NearestTable> element_table;  // null: use code_element->encode

  bool affine() const { return zero != nullptr; }
  // Bits per element, every scale, zero point and meta-scale included, for a
  // rows x cols tensor whose reduction axis is `axis` (1: along a row).
  double bits_per_element(std::uint64_t rows, std::uint64_t cols, int axis = 1) const;
  // Bits per element for an unbounded tensor (blocks all full; per-tensor terms vanish).
  double nominal_bits_per_element() const;
};

// Parses a scaled-format spec (a bare element spec is a fixed-scale format).
// Throws lobit::Error (usage) with a hint.
std::shared_ptr<const ScaledFormat> parse_scaled(std::string_view spec);

// The element's largest magnitude reachable with either sign (int4: 7; unsigned:
// the top value), which amax maps to, and the exponent the OCP MX rule subtracts.
double element_max(const ElementFormat& e);
int element_emax(const ElementFormat& e);  // ilogb(element max): E2M1 2, E4M3 8, E5M2 15, MX INT8 0

}  // namespace lobit
