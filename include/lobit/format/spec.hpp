#pragma once
// Format spec text -> element format, and the named presets.
//
//   spec    := head ('+' key '=' value)*
//   head    := preset name | family | path to a .toml preset file
//   family  := float | int | pow2 | codebook | normal-quantile | lloyd-max
//
// `eXmY` that is not a preset is an IEEE 754-style float of X exponent and Y
// mantissa bits; `intN` / `uintN` is an N-bit integer for any N in 2..16. Keys
// override the head's parameters. `@` is reserved for block scaling.
#include <memory>
#include <string>
#include <string_view>
#include <vector>

#include "lobit/format/element_format.hpp"

namespace lobit {

struct Preset {
  std::string name;
  std::vector<std::string> aliases;
  std::string summary;  // one line
  std::string source;   // the standard or paper that defines it
  std::string spec;     // parameter form, or empty for a codebook given by values
  std::vector<double> values;
  std::string file;     // the TOML file it came from
  bool scaled() const { return spec.find('@') != std::string::npos; }  // a block-scaled composition
};

// The presets shipped in formats/ (embedded in the library at build time).
const std::vector<Preset>& presets();
const Preset* find_preset(std::string_view name);  // by name or alias

// Parses an element-format spec. Throws lobit::Error (usage) with a hint, and
// nearest preset names for an unknown head.
std::shared_ptr<const ElementFormat> parse_element(std::string_view spec);

// Loads a preset-style TOML file (keys: spec or values, optional bits, summary).
Preset load_preset_file(const std::string& path);
Preset parse_preset_toml(std::string_view text, const std::string& origin);

// Preset names closest to `name` (edit distance), best first.
std::vector<std::string> nearest_presets(std::string_view name, std::size_t count = 3);

}  // namespace lobit
