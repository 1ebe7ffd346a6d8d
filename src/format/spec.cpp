#include "lobit/format/spec.hpp"

#include <algorithm>
#include <charconv>
#include <cmath>
#include <fmt/format.h>
#include <fstream>
#include <map>
#include <optional>
#include <sstream>
#include <tuple>
#include <toml++/toml.h>

#include "lobit/detail/edit_distance.hpp"
#include "lobit/error.hpp"
#include "lobit/format/codebook.hpp"
#include "lobit/format/integer.hpp"
#include "lobit/format/minifloat.hpp"
#include "lobit/format/power_of_two.hpp"
#include "lobit/design/lloyd_max.hpp"

namespace lobit {

// Defined in the generated presets_embedded.cpp.
struct EmbeddedFile {
  const char* name;
  const char* text;
};
extern const EmbeddedFile embedded_presets[];
extern const std::size_t embedded_preset_count;

namespace {

std::string lower(std::string_view s) {
  std::string r(s);
  for (char& c : r) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return r;
}

using detail::edit_distance;

double parse_double(std::string_view text, const std::string& where) {
  std::string s(text);
  char* end = nullptr;
  errno = 0;
  const double v = std::strtod(s.c_str(), &end);
  if (s.empty() || end != s.c_str() + s.size() || std::isspace(static_cast<unsigned char>(s[0])))
    throw usage_error(fmt::format("'{}' is not a number", s), where, "write a decimal or hex-float number");
  if (errno == ERANGE && std::isinf(v))
    throw usage_error(fmt::format("'{}' is outside binary64", s), where, "use a smaller magnitude");
  return v;
}

int parse_int(std::string_view text, const std::string& key) {
  int v = 0;
  auto [p, ec] = std::from_chars(text.data(), text.data() + text.size(), v);
  if (ec != std::errc() || p != text.data() + text.size())
    throw usage_error(fmt::format("{}={} is not an integer", key, text), "format spec",
                      fmt::format("write {}=<whole number>", key));
  return v;
}

bool parse_bool(std::string_view text, const std::string& key) {
  if (text == "yes" || text == "on" || text == "true") return true;
  if (text == "no" || text == "off" || text == "false") return false;
  throw usage_error(fmt::format("{}={} is not yes or no", key, text), "format spec",
                    fmt::format("write {}=yes or {}=no", key, key));
}

std::vector<double> parse_value_list(std::string_view text) {
  std::vector<double> out;
  std::size_t start = 0;
  while (start <= text.size()) {
    const std::size_t slash = text.find('/', start);
    const std::string_view item = text.substr(start, slash == std::string_view::npos ? std::string_view::npos
                                                                                       : slash - start);
    out.push_back(parse_double(item, "codebook values"));
    if (slash == std::string_view::npos) break;
    start = slash + 1;
  }
  return out;
}

std::vector<Preset> load_embedded() {
  std::vector<Preset> out;
  for (std::size_t i = 0; i < embedded_preset_count; ++i)
    out.push_back(parse_preset_toml(embedded_presets[i].text, embedded_presets[i].name));
  // Floats first (widest first), then power-of-two, integers, codebooks.
  auto rank = [](const Preset& p) {
    const std::string head = p.spec.substr(0, p.spec.find('+'));
    if (!p.values.empty() || head == "codebook") return 3;
    if (p.spec.find('@') != std::string::npos) return 4;
    return head == "float" ? 0 : head == "pow2" ? 1 : 2;
  };
  std::sort(out.begin(), out.end(), [&](const Preset& a, const Preset& b) {
    const auto ka = std::tuple(rank(a), a.file), kb = std::tuple(rank(b), b.file);
    return ka < kb;
  });
  return out;
}

using Keys = std::vector<std::pair<std::string, std::string>>;

const char* float_keys = "exp, man, bias, sign, subnormals, special";
const char* int_keys = "bits, signed, range, frac";
const char* pow2_keys = "exp, bias, sign, zero, nan";
const char* codebook_keys = "values, bits, file";
const char* nq_keys = "bits, offset";

[[noreturn]] void unknown_key(const std::string& key, std::string_view family, const char* allowed) {
  throw usage_error(fmt::format("unknown key '{}' for a {} format", key, family), "format spec",
                    fmt::format("keys of {}: {}", family, allowed));
}

std::shared_ptr<const ElementFormat> build_float(MinifloatParams p, bool bias_given, const Keys& keys) {
  bool reset_bias = false;
  for (auto& [k, v] : keys) {
    if (k == "exp") p.exp_bits = parse_int(v, k), reset_bias = true;
    else if (k == "man") p.man_bits = parse_int(v, k);
    else if (k == "bias") p.bias = parse_int(v, k), bias_given = true;
    else if (k == "sign") p.sign = parse_bool(v, k);
    else if (k == "subnormals") p.subnormals = parse_bool(v, k);
    else if (k == "special") {
      if (v == "ieee") p.special = SpecialValues::ieee;
      else if (v == "top-nan") p.special = SpecialValues::top_nan;
      else if (v == "negzero-nan") p.special = SpecialValues::neg_zero_nan;
      else if (v == "none") p.special = SpecialValues::none;
      else
        throw usage_error(fmt::format("special={} is not a layout", v), "format spec",
                          "use special=ieee, top-nan, negzero-nan or none");
      reset_bias = true;
    } else unknown_key(k, "float", float_keys);
  }
  if (reset_bias && !bias_given) p.bias = MinifloatParams::default_bias(p.exp_bits, p.special);
  return std::make_shared<Minifloat>(p);
}

std::shared_ptr<const ElementFormat> build_int(IntegerParams p, const Keys& keys) {
  for (auto& [k, v] : keys) {
    if (k == "bits") p.bits = parse_int(v, k);
    else if (k == "signed") p.sign = parse_bool(v, k);
    else if (k == "range") {
      if (v == "full") p.symmetric = false;
      else if (v == "symmetric") p.symmetric = true;
      else throw usage_error(fmt::format("range={} is not a range", v), "format spec", "use range=full or range=symmetric");
    } else if (k == "frac") p.frac_bits = parse_int(v, k);
    else unknown_key(k, "int", int_keys);
  }
  return std::make_shared<Integer>(p);
}

std::shared_ptr<const ElementFormat> build_pow2(PowerOfTwoParams p, bool bias_given, const Keys& keys) {
  bool reset_bias = false;
  for (auto& [k, v] : keys) {
    if (k == "exp") p.exp_bits = parse_int(v, k), reset_bias = true;
    else if (k == "bias") p.bias = parse_int(v, k), bias_given = true;
    else if (k == "sign") p.sign = parse_bool(v, k);
    else if (k == "zero") p.zero = parse_bool(v, k);
    else if (k == "nan") p.nan = parse_bool(v, k);
    else unknown_key(k, "pow2", pow2_keys);
  }
  if (reset_bias && !bias_given) p.bias = (1 << (p.exp_bits - 1)) - 1;
  return std::make_shared<PowerOfTwo>(p);
}

std::shared_ptr<const ElementFormat> build_codebook(std::vector<double> values, int bits, const Keys& keys) {
  for (auto& [k, v] : keys) {
    if (k == "values") values = parse_value_list(v);
    else if (k == "bits") bits = parse_int(v, k);
    else if (k == "file") {
      Preset p = load_preset_file(v);
      if (p.values.empty())
        throw usage_error("the file has no 'values' list", v, "write values = [ ... ] in the TOML file");
      values = p.values;
    } else unknown_key(k, "codebook", codebook_keys);
  }
  if (values.empty())
    throw usage_error("a codebook needs values", "format spec", "write codebook+values=-1/0/1 or codebook+file=PATH.toml");
  return std::make_shared<Codebook>(values, bits);
}

std::shared_ptr<const ElementFormat> build_normal_quantile(int bits, std::optional<double> offset, const Keys& keys) {
  for (auto& [k, v] : keys) {
    if (k == "bits") bits = parse_int(v, k);
    else if (k == "offset") offset = parse_double(v, "normal-quantile offset");
    else unknown_key(k, "normal-quantile", nq_keys);
  }
  const double off = offset ? *offset : normal_quantile_default_offset(bits);
  auto levels = normal_quantile_levels(bits, off);
  std::string gen = fmt::format("normal-quantile+bits={}", bits);
  if (offset) gen += fmt::format("+offset={}", *offset);
  return std::make_shared<Codebook>(levels, bits, gen);
}

// Digits only, as a small int (empty or too long: nullopt).
std::optional<int> small_number(std::string_view s) {
  if (s.empty() || s.size() > 4) return std::nullopt;
  int v = 0;
  for (char c : s) {
    if (c < '0' || c > '9') return std::nullopt;
    v = v * 10 + (c - '0');
  }
  return v;
}

// "eXmY" -> (X, Y)
std::shared_ptr<const ElementFormat> build_lloyd_max(const Keys& keys) {
  int levels = 16;
  Density d = Density::gauss;
  for (auto& [k, v] : keys) {
    if (k == "levels") levels = parse_int(v, k);
    else if (k == "density") {
      auto pd = parse_density(v);
      if (!pd) throw usage_error(fmt::format("density={} is not known", v), "format spec", "use gauss, laplace or uniform");
      d = *pd;
    } else unknown_key(k, "lloyd-max", "levels, density");
  }
  if (levels < 2 || levels > 4096)
    throw usage_error(fmt::format("levels={} is out of range", levels), "format spec", "use 2 to 4096 levels");
  return lloyd_max_codebook(d, levels);
}

std::optional<std::pair<int, int>> exmy(std::string_view head) {
  if (head.size() < 4 || head[0] != 'e') return std::nullopt;
  const std::size_t m = head.find('m');
  if (m == std::string_view::npos) return std::nullopt;
  auto e = small_number(head.substr(1, m - 1));
  auto man = small_number(head.substr(m + 1));
  if (!e || !man) return std::nullopt;
  return std::pair{*e, *man};
}

// "intN" / "uintN" -> (signed, N)
std::optional<std::pair<bool, int>> intn(std::string_view head) {
  const bool is_unsigned = head.rfind("uint", 0) == 0;
  if (!is_unsigned && head.rfind("int", 0) != 0) return std::nullopt;
  auto n = small_number(head.substr(is_unsigned ? 4 : 3));
  if (!n) return std::nullopt;
  return std::pair{!is_unsigned, *n};
}

}  // namespace

const std::vector<Preset>& presets() {
  static const std::vector<Preset> all = load_embedded();
  return all;
}

const Preset* find_preset(std::string_view name) {
  for (const auto& p : presets()) {
    if (p.name == name) return &p;
    for (const auto& a : p.aliases)
      if (a == name) return &p;
  }
  return nullptr;
}

std::vector<std::string> nearest_presets(std::string_view name, std::size_t count) {
  std::vector<std::pair<std::size_t, std::string>> scored;
  const std::string n = lower(name);
  for (const auto& p : presets()) {
    std::size_t best = edit_distance(n, p.name);
    for (const auto& a : p.aliases) best = std::min(best, edit_distance(n, a));
    scored.emplace_back(best, p.name);
  }
  std::stable_sort(scored.begin(), scored.end(), [](auto& a, auto& b) { return a.first < b.first; });
  std::vector<std::string> out;
  for (std::size_t i = 0; i < scored.size() && i < count; ++i) out.push_back(scored[i].second);
  return out;
}

Preset parse_preset_toml(std::string_view text, const std::string& origin) {
  toml::table t;
  try {
    t = toml::parse(text, origin);
  } catch (const toml::parse_error& e) {
    const auto& src = e.source();
    throw usage_error(std::string(e.description()),
                      fmt::format("{}:{}:{}", origin, src.begin.line, src.begin.column),
                      "fix the TOML syntax");
  }
  Preset p;
  p.file = origin;
  p.name = t["name"].value_or(std::string{});
  p.summary = t["summary"].value_or(std::string{});
  p.source = t["source"].value_or(std::string{});
  p.spec = t["spec"].value_or(std::string{});
  if (auto* arr = t["aliases"].as_array())
    for (auto& a : *arr)
      if (auto s = a.value<std::string>()) p.aliases.push_back(*s);
  if (auto* arr = t["values"].as_array()) {
    for (std::size_t i = 0; i < arr->size(); ++i) {
      auto v = (*arr)[i].value<double>();
      if (!v)
        throw usage_error(fmt::format("values[{}] is not a number", i), origin, "list numbers only");
      p.values.push_back(*v);
    }
  }
  if (auto bits = t["bits"].value<int64_t>()) {
    if (p.values.empty()) throw usage_error("'bits' is only for a values list", origin, "put bits in the spec text");
    p.spec = fmt::format("codebook+bits={}", *bits);
  }
  if (p.spec.empty() && p.values.empty())
    throw usage_error("a preset needs 'spec' or 'values'", origin, "add spec = \"...\" or values = [ ... ]");
  if (!p.spec.empty() && !p.values.empty() && p.spec.rfind("codebook", 0) != 0)
    throw usage_error("a preset has either 'spec' or 'values', not both", origin, "keep one");
  return p;
}

Preset load_preset_file(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) throw usage_error("cannot open the file", path, "check the path to the .toml file");
  std::stringstream ss;
  ss << in.rdbuf();
  return parse_preset_toml(ss.str(), path);
}

namespace {
std::shared_ptr<const ElementFormat> from_preset(const Preset& p, const Keys& keys, int depth);

std::shared_ptr<const ElementFormat> parse_with_keys(std::string_view head, const Keys& keys, int depth) {
  if (depth > 4) throw usage_error("preset specs refer to each other in a loop", std::string(head));
  const std::string h(head);
  if (const Preset* p = find_preset(h)) return from_preset(*p, keys, depth);
  if (h.size() > 5 && h.substr(h.size() - 5) == ".toml") return from_preset(load_preset_file(h), keys, depth);
  if (h == "float") {
    MinifloatParams mp;
    mp.bias = MinifloatParams::default_bias(mp.exp_bits, mp.special);
    return build_float(mp, false, keys);
  }
  if (h == "int") return build_int(IntegerParams{}, keys);
  if (h == "pow2") return build_pow2(PowerOfTwoParams{}, false, keys);
  if (h == "codebook") return build_codebook({}, 0, keys);
  if (h == "normal-quantile") return build_normal_quantile(4, std::nullopt, keys);
  if (h == "lloyd-max") return build_lloyd_max(keys);
  if (auto em = exmy(h)) {
    MinifloatParams mp;
    mp.exp_bits = em->first;
    mp.man_bits = em->second;
    mp.special = SpecialValues::ieee;
    mp.bias = MinifloatParams::default_bias(mp.exp_bits, mp.special);
    if (mp.exp_bits == 0) mp.special = SpecialValues::none;
    return build_float(mp, false, keys);
  }
  if (auto in = intn(h)) {
    IntegerParams ip;
    ip.sign = in->first;
    ip.bits = in->second;
    return build_int(ip, keys);
  }
  auto near = nearest_presets(h);
  std::string hint = "did you mean " + fmt::format("{}", fmt::join(near, ", ")) +
                     "? `lobit formats` lists the presets; families: float, int, pow2, codebook, normal-quantile, lloyd-max";
  throw usage_error(fmt::format("unknown format '{}'", h), "format spec", hint);
}

std::shared_ptr<const ElementFormat> from_preset(const Preset& p, const Keys& keys, int depth) {
  if (!p.values.empty()) {
    int bits = 0;
    if (p.spec.rfind("codebook+bits=", 0) == 0) bits = std::stoi(p.spec.substr(14));
    return build_codebook(p.values, bits, keys);
  }
  if (p.spec.find('@') != std::string::npos)
    throw usage_error(fmt::format("'{}' is a block-scaled format ({})", p.name, p.spec), "format spec",
                      "use it where block-scaled formats are accepted (lobit score), or name its element alone");
  // A preset's spec is itself a spec: parse it, then apply the extra keys.
  std::string_view s = p.spec;
  const std::size_t plus = s.find('+');
  Keys base;
  std::string_view head = s.substr(0, plus);
  if (plus != std::string_view::npos) {
    std::string_view rest = s.substr(plus + 1);
    while (!rest.empty()) {
      const std::size_t next = rest.find('+');
      std::string_view item = rest.substr(0, next);
      const std::size_t eq = item.find('=');
      base.emplace_back(std::string(item.substr(0, eq)), std::string(item.substr(eq + 1)));
      rest = next == std::string_view::npos ? std::string_view{} : rest.substr(next + 1);
    }
  }
  // Extra keys apply on top of the preset: rebuild with both lists. A changed
  // exp or special resets the bias to its default unless a bias is given.
  Keys all = base;
  bool user_bias = false, user_resets = false;
  for (auto& kv : keys) {
    if (kv.first == "bias") user_bias = true;
    if (kv.first == "exp" || kv.first == "special") user_resets = true;
  }
  if (user_resets && !user_bias)
    all.erase(std::remove_if(all.begin(), all.end(), [](auto& kv) { return kv.first == "bias"; }), all.end());
  all.insert(all.end(), keys.begin(), keys.end());
  return parse_with_keys(head, all, depth + 1);
}
}  // namespace

std::shared_ptr<const ElementFormat> parse_element(std::string_view spec) {
  const std::string where = fmt::format("format '{}'", spec);
  if (spec.empty()) throw usage_error("empty format spec", "format spec", "name a preset, e.g. e4m3; see `lobit formats`");
  if (spec.find('@') != std::string_view::npos)
    throw usage_error("block-scaled formats (ELEMENT@BLOCK:SCALE) are not available in this command", where,
                      "give the element format alone");
  for (char c : spec)
    if (std::isspace(static_cast<unsigned char>(c)))
      throw usage_error("a format spec has no spaces", where, "join parts with '+', e.g. e4m3+bias=8");
  const std::size_t plus = spec.find('+');
  const std::string_view head = spec.substr(0, plus);
  Keys keys;
  if (plus != std::string_view::npos) {
    std::string_view rest = spec.substr(plus + 1);
    for (;;) {
      const std::size_t next = rest.find('+');
      const std::string_view item = rest.substr(0, next);
      const std::size_t eq = item.find('=');
      if (item.empty() || eq == std::string_view::npos || eq == 0 || eq + 1 == item.size())
        throw usage_error(fmt::format("'{}' is not key=value", item), where, "write +key=value, e.g. +bias=8");
      keys.emplace_back(std::string(item.substr(0, eq)), std::string(item.substr(eq + 1)));
      if (next == std::string_view::npos) break;
      rest = rest.substr(next + 1);
    }
  }
  try {
    return parse_with_keys(head, keys, 0);
  } catch (Error& e) {
    if (e.where() == "format spec" || e.where().find("format") != std::string::npos)
      throw Error(e.kind(), e.what(), where, e.hint());
    throw;
  }
}

}  // namespace lobit
