#include "lobit/emit/lut.hpp"

#include <algorithm>
#include <bit>
#include <cctype>
#include <functional>
#include <cfloat>
#include <cmath>
#include <fmt/format.h>
#include <limits>

#include "lobit/detail/number_text.hpp"
#include "lobit/error.hpp"
#include "lobit/format/properties.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/scale/scaled_format.hpp"
#include "lobit/version.hpp"

namespace lobit::emit {

std::optional<LutLanguage> parse_lut_language(std::string_view n) {
  if (n == "c") return LutLanguage::c;
  if (n == "cpp" || n == "c++") return LutLanguage::cpp;
  if (n == "cuda") return LutLanguage::cuda;
  if (n == "json") return LutLanguage::json;
  if (n == "csv") return LutLanguage::csv;
  return std::nullopt;
}
std::optional<DecodeType> parse_decode_type(std::string_view n) {
  if (n == "f32" || n == "fp32" || n == "float32") return DecodeType::f32;
  if (n == "f16" || n == "fp16" || n == "float16") return DecodeType::f16;
  if (n == "bf16" || n == "bfloat16") return DecodeType::bf16;
  if (n == "int" || n == "scaled-int") return DecodeType::scaled_int;
  return std::nullopt;
}
std::optional<PackOrder> parse_pack_order(std::string_view n) {
  if (n == "lo-first") return PackOrder::lo_first;
  if (n == "hi-first") return PackOrder::hi_first;
  return std::nullopt;
}
std::string_view to_string(LutLanguage l) {
  switch (l) {
    case LutLanguage::c: return "c";
    case LutLanguage::cpp: return "cpp";
    case LutLanguage::cuda: return "cuda";
    case LutLanguage::json: return "json";
    case LutLanguage::csv: return "csv";
  }
  return "?";
}
std::string_view to_string(DecodeType t) {
  switch (t) {
    case DecodeType::f32: return "f32";
    case DecodeType::f16: return "f16";
    case DecodeType::bf16: return "bf16";
    case DecodeType::scaled_int: return "int";
  }
  return "?";
}
std::string_view to_string(PackOrder p) { return p == PackOrder::lo_first ? "lo-first" : "hi-first"; }

std::string lut_identifier_stem(std::string_view text) {
  std::string s;
  for (char ch : text) {
    const auto u = static_cast<unsigned char>(ch);
    if (std::isalnum(u)) s += static_cast<char>(std::tolower(u));
    else if (!s.empty() && s.back() != '_') s += '_';
  }
  while (!s.empty() && s.back() == '_') s.pop_back();
  if (s.empty()) s = "format";
  if (std::isdigit(static_cast<unsigned char>(s[0]))) s = "f" + s;
  if (s.size() > 48) s = s.substr(0, 48);
  while (!s.empty() && s.back() == '_') s.pop_back();
  return s;
}

namespace {

std::uint32_t f32_bits(float f) { return std::bit_cast<std::uint32_t>(f); }
float f32_of(std::uint32_t b) { return std::bit_cast<float>(b); }

// Smallest float32 in (-inf, +inf] that goes above the threshold under nearest-even.
std::uint32_t up_from(const Threshold& t) {
  auto goes_up = [&](float f) {
    const int c = t.compare(static_cast<double>(f));
    return c > 0 || (c == 0 && t.tie_to_upper);
  };
  float f = static_cast<float>(t.nearest);  // may overflow to +-inf
  if (std::isinf(f) && f < 0) f = -FLT_MAX;
  while (!goes_up(f)) f = std::nextafter(f, INFINITY);  // ends: +inf is above every finite threshold
  while (f > -FLT_MAX) {
    const float p = std::nextafter(f, -INFINITY);
    if (!goes_up(p)) break;
    f = p;
  }
  if (f == 0) f = 0.0f;  // -0 and +0 share one key
  return f32_bits(f);
}

std::string hexv(double v) { return detail::hex_text(v); }
std::string decv(double v) {
  if (std::isnan(v)) return "nan";
  if (std::isinf(v)) return v > 0 ? "inf" : "-inf";
  return fmt::format("{}", v);
}
std::string code_hex(Code c, int bits) { return fmt::format("0x{:0{}x}", c, (bits + 3) / 4); }

// Comment-safe text: no comment terminators, no control characters.
std::string comment_safe(std::string s) {
  for (auto& ch : s)
    if (static_cast<unsigned char>(ch) < 0x20) ch = ' ';
  std::size_t p;
  while ((p = s.find("*/")) != std::string::npos) s.replace(p, 2, "* /");
  return s;
}

std::string json_string(std::string_view s) {
  std::string o = "\"";
  for (char ch : s) {
    const auto u = static_cast<unsigned char>(ch);
    if (ch == '"' || ch == '\\') o += '\\', o += ch;
    else if (u < 0x20) o += fmt::format("\\u{:04x}", u);
    else o += ch;
  }
  return o + "\"";
}

std::string csv_field(std::string_view s) {
  if (s.find_first_of(",\"\n") == std::string_view::npos) return std::string(s);
  std::string o = "\"";
  for (char ch : s) {
    if (ch == '"') o += '"';
    o += ch;
  }
  return o + "\"";
}

void require_table_width(const ElementFormat& f) {
  if (f.bits() > 16)
    throw usage_error(fmt::format("a lookup table needs a format of at most 16 bits; this one has {} ({} codes)",
                                  f.bits(), f.bits() >= 64 ? std::string("2^64") : fmt::format("2^{}", f.bits())),
                      f.spec(),
                      "use the library's arithmetic encoder instead: lobit::parse_element(spec)->encode(x), or "
                      "`lobit encode`");
}

}  // namespace

LutEncodePlan plan_encode(const ElementFormat& f, Overflow overflow) {
  require_table_width(f);
  const ValueTable vt(f);
  LutEncodePlan p;
  p.overflow = f.resolve(overflow);
  const Overflow o = p.overflow;
  const auto& vals = vt.values();
  const auto& codes = vt.codes();
  auto add = [&](double below, double above, const Threshold& t, bool ovf) {
    LutThreshold lt;
    lt.below = below;
    lt.above = above;
    lt.exact = t;
    lt.overflow = ovf;
    lt.up_from_bits = up_from(t);
    p.thresholds.push_back(lt);
  };
  if (vt.lower_overflow()) {
    // The result of a negative overflow is what the library gives -inf (the same rule, IEEE 754 section 7.4).
    p.slot_codes.push_back(f.encode(-INFINITY, Rounding::nearest_even, o));
    add(-f.virtual_next_above_max()->value, vals.front(), *vt.lower_overflow(), true);
  }
  for (std::size_t i = 0; i < vals.size(); ++i) {
    if (vals[i] == 0) p.zero_slot = p.slot_codes.size();
    p.slot_codes.push_back(codes[i]);
    if (i + 1 < vals.size()) add(vals[i], vals[i + 1], vt.thresholds()[i], false);
  }
  if (vt.upper_overflow()) {
    add(vals.back(), f.virtual_next_above_max()->value, *vt.upper_overflow(), true);
    p.slot_codes.push_back(f.encode(INFINITY, Rounding::nearest_even, o));
  }
  if (f.has_negative_zero()) p.negative_zero_code = f.encode(-0.0, Rounding::nearest_even, o);
  if (auto n = f.nan_code()) {
    p.nan_result = *n;
    p.nan_from_library = true;
  } else {
    p.nan_result = f.encode(0.0, Rounding::nearest_even, o);
  }
  p.pos_inf_result = f.encode(INFINITY, Rounding::nearest_even, o);
  p.neg_inf_result = f.encode(-INFINITY, Rounding::nearest_even, o);
  return p;
}

DecodeTable decode_table(const ElementFormat& f, DecodeType type) {
  require_table_width(f);
  if (type == DecodeType::scaled_int) type = DecodeType::f32;  // the integer table is scaled_int_table's
  DecodeTable t;
  t.type = type;
  const Code n = Code{1} << f.bits();
  std::shared_ptr<const ElementFormat> half;
  if (type == DecodeType::f16) half = parse_element("fp16");
  if (type == DecodeType::bf16) half = parse_element("bf16");
  for (Code c = 0; c < n; ++c) {
    const CodeClass k = f.classify(c);
    const double v = f.decode(c);
    std::uint32_t b = 0;
    double got = v;
    if (k == CodeClass::nan || k == CodeClass::unused || std::isnan(v)) {
      // Quiet NaN (IEEE 754-2019 section 6.2.1: the leading significand bit set marks a quiet NaN).
      b = type == DecodeType::f32 ? 0x7fc00000u : static_cast<std::uint32_t>(*half->nan_code());
      t.bits.push_back(b);
      continue;
    }
    if (type == DecodeType::f32) {
      const float fv = static_cast<float>(v);  // round to nearest even (the default FP environment)
      b = f32_bits(fv);
      got = fv;
    } else {
      const Code hc = half->encode(v, Rounding::nearest_even, Overflow::special);
      b = static_cast<std::uint32_t>(hc);
      got = half->decode(hc);
    }
    t.bits.push_back(b);
    if (std::isinf(v)) continue;
    if (got != v) {
      t.exact = false;
      const double err = std::isinf(got) ? INFINITY : std::fabs(got - v);
      const double rel = v == 0 ? 0 : err / std::fabs(v);
      if (!t.worst_code || err > t.max_abs_error) t.worst_code = c;
      t.max_abs_error = std::max(t.max_abs_error, err);
      t.max_rel_error = std::max(t.max_rel_error, rel);
    }
  }
  return t;
}

ScaledIntTable scaled_int_table(const ElementFormat& f) {
  require_table_width(f);
  const Code n = Code{1} << f.bits();
  ScaledIntTable t;
  std::vector<double> v(n, 0.0);
  int e = std::numeric_limits<int>::max();
  for (Code c = 0; c < n; ++c) {
    const CodeClass k = f.classify(c);
    const bool num = k == CodeClass::zero || k == CodeClass::subnormal || k == CodeClass::normal;
    t.number.push_back(num);
    if (!num) continue;
    v[c] = f.decode(c);
    if (v[c] == 0) continue;
    int ex;
    const double m = std::frexp(std::fabs(v[c]), &ex);  // |v| = m * 2^ex, m in [0.5, 1)
    double sig = std::ldexp(m, 53);                     // an integer below 2^53
    int low = ex - 53;
    while (std::fmod(sig, 2.0) == 0) sig /= 2, ++low;
    e = std::min(e, low);
  }
  if (e == std::numeric_limits<int>::max()) e = 0;
  t.exponent = e;
  double kmin = 0, kmax = 0;
  std::optional<Code> worst;
  for (Code c = 0; c < n; ++c) {
    const double kd = t.number[c] ? std::ldexp(v[c], -e) : 0.0;  // exact: a power-of-two scaling (or inf)
    if (!std::isfinite(kd) || std::fabs(kd) > 0x1p32) {
      if (!worst) worst = c;
      t.k.push_back(0);
      continue;
    }
    kmin = std::min(kmin, kd);
    kmax = std::max(kmax, kd);
    t.k.push_back(static_cast<std::int64_t>(kd));
  }
  t.is_signed = kmin < 0;
  const double lim32 = t.is_signed ? 0x1p31 : 0x1p32;
  const bool fits = !worst && (t.is_signed ? (kmin >= -lim32 && kmax <= lim32 - 1) : kmax <= lim32 - 1);
  if (!fits) {
    // The largest |k| over all codes, for the message.
    Code wc = 0;
    double wk = 0;
    for (Code c = 0; c < n; ++c)
      if (t.number[c] && std::fabs(std::ldexp(v[c], -e)) > wk) wk = std::fabs(std::ldexp(v[c], -e)), wc = c;
    throw usage_error(fmt::format("no 32-bit integer table holds this format: with the common exponent 2^({}) (the lowest "
                                  "set bit over all values) code {} needs k = {} ({}), past the {} 32-bit range",
                                  e, code_hex(wc, f.bits()), std::isfinite(wk) ? fmt::format("{:.17g}", wk) : "inf",
                                  hexv(v[wc]), t.is_signed ? "signed" : "unsigned"),
                      "--decode-type int", "use --decode-type f32 (or f16 / bf16)");
  }
  const double lo = t.is_signed ? kmin : 0, hi = kmax;
  t.type_bits = 32;
  for (int b : {8, 16}) {
    const double L = t.is_signed ? -std::ldexp(1.0, b - 1) : 0, H = std::ldexp(1.0, t.is_signed ? b - 1 : b) - 1;
    if (lo >= L && hi <= H) {
      t.type_bits = b;
      break;
    }
  }
  return t;
}

LutStochasticPlan plan_stochastic(const ElementFormat& f, Overflow overflow) {
  require_table_width(f);
  const ValueTable vt(f);
  LutStochasticPlan p;
  const Overflow o = f.resolve(overflow);
  p.values = vt.values();
  p.codes = vt.codes();
  const double top = p.values.back(), bottom = p.values.front();
  const double fmax = static_cast<double>(FLT_MAX);
  // The same virtual neighbours ValueTable uses (value_table.cpp); kept only where a float32 can lie past that end.
  if (auto vn = f.virtual_next_above_max()) {
    if (top < fmax) {
      p.upper_virtual = vn->value;
      p.upper_overflow_code = f.encode(vn->value, Rounding::stochastic, o, 0);
    }
    if (f.is_signed() && bottom == -top && bottom > -fmax) {
      p.lower_virtual = -vn->value;
      p.lower_overflow_code = f.encode(-vn->value, Rounding::stochastic, o, 0);
    }
  }
  for (std::size_t i = 0; i < p.values.size(); ++i)
    if (p.values[i] == 0) p.zero_index = i;
  if (p.zero_index) {
    const Code nz = f.encode(-0.0, Rounding::stochastic, o, 0);
    if (nz != p.codes[*p.zero_index]) p.negative_zero_code = nz;
  }
  if (auto nc = f.nan_code()) {
    p.nan_result = *nc;
    p.nan_from_library = true;
  } else {
    p.nan_result = f.encode(0.0, Rounding::nearest_even, o);  // as the nearest-even encoder: one fixed code
  }
  p.pos_inf_result = f.encode(INFINITY, Rounding::stochastic, o, 0);
  p.neg_inf_result = f.encode(-INFINITY, Rounding::stochastic, o, 0);
  return p;
}

namespace {

bool valid_namespace(const std::string& ns) {
  if (ns.empty()) return false;
  std::size_t i = 0;
  while (i <= ns.size()) {
    std::size_t j = ns.find("::", i);
    if (j == std::string::npos) j = ns.size();
    const std::string part = ns.substr(i, j - i);
    if (part.empty() || std::isdigit(static_cast<unsigned char>(part[0]))) return false;
    for (char ch : part)
      if (!(std::isalnum(static_cast<unsigned char>(ch)) || ch == '_')) return false;
    i = j + 2;
    if (j == ns.size()) break;
  }
  return true;
}

struct Emitter {
  const ElementFormat& f;
  const LutOptions& o;
  LutEncodePlan plan;
  DecodeTable dec;
  FormatProperties props;
  std::string stem, P, M;  // P: lobit_<stem>, M: LOBIT_<STEM>
  std::string out;
  const ScaledFormat* scaled = nullptr;  // block-scaled: the block layout and dequantize are emitted too
  std::optional<ScaledIntTable> idec{};  // --decode-type int: the k table replaces the float decode table
  std::optional<LutStochasticPlan> sr{}; // --stochastic
  bool c_lang() const { return o.language == LutLanguage::c; }
  bool cuda() const { return o.language == LutLanguage::cuda; }
  int bits() const { return f.bits(); }
  Code count() const { return Code{1} << f.bits(); }
  std::size_t padded() const {  // 2^k - 1 >= thresholds, k >= 1
    std::size_t pp = 2;
    while (pp - 1 < std::max<std::size_t>(plan.thresholds.size(), 1)) pp <<= 1;
    return pp;
  }
  std::string ty(std::string_view t) const { return c_lang() ? std::string(t) : "std::" + std::string(t); }
  std::string code_t() const { return ty(bits() <= 8 ? "uint8_t" : "uint16_t"); }
  std::string fn() const {
    if (c_lang()) return "static inline";
    if (cuda()) return M + "_HD inline";
    return "inline";
  }
  std::string title() const { return o.title.empty() ? f.spec() : o.title; }
  std::string dec_name() const { return std::string(to_string(dec.type)); }
  std::string tab(const std::string& name) const { return cuda() ? M + "_TABLE(" + name + ")" : name; }
  bool has_pack() const { return bits() == 2 || bits() == 4 || bits() == 6; }
  std::string chx(Code c) const { return code_hex(c, bits()); }

  void header_comment(const char* open, const char* line, const char* close) {
    auto L = [&](const std::string& s) { out += line + comment_safe(s) + "\n"; };
    out += open;
    out += "\n";
    L(fmt::format("Generated by lobit {}; do not edit. The command that generated this file:", version()));
    L("  " + o.command);
    if (scaled)
      L(fmt::format("Element format: {}  ({}, {} bits, {} codes)", f.spec(), f.family(), bits(), count()));
    else
      L(fmt::format("Format: {}  ({}, {} bits, {} codes)", title() == f.spec() ? f.spec() : title() + " = " + f.spec(),
                    f.family(), bits(), count()));
    std::string pr = fmt::format("Properties: max finite {} ({}), lowest finite {} ({}), smallest positive {}",
                                 hexv(props.max_finite), decv(props.max_finite), hexv(props.lowest_finite),
                                 decv(props.lowest_finite), hexv(props.min_positive));
    L(pr);
    L(fmt::format("  min normal {}, min subnormal {}, distinct finite values {}, NaN codes {}, infinity codes {}, "
                  "unused codes {}, negative zero {}",
                  props.min_normal ? hexv(*props.min_normal) : "-", props.min_subnormal ? hexv(*props.min_subnormal) : "none",
                  props.distinct_finite, props.nan_codes, props.infinity_codes, props.unused_codes,
                  props.negative_zero ? chx(*props.negative_zero) : "none"));
    if (idec)
      L(fmt::format("Decode: scaled integers, value = k * 2^{} with k an {}int{}_t, exact for every finite code.",
                    idec->exponent, idec->is_signed ? "" : "u", idec->type_bits));
    else if (dec.exact)
      L(fmt::format("Decode: {} bit patterns, exact for every code (NaN and unused codes: the quiet NaN {}).",
                    dec_name(), dec.type == DecodeType::f32 ? "0x7fc00000" : dec.type == DecodeType::f16 ? "0x7e00" : "0x7fc0"));
    else
      L(fmt::format("Decode: {} bit patterns, INEXACT (--allow-inexact): values rounded to nearest-even in {}; largest "
                    "absolute error {} (code {}), largest relative error {}.",
                    dec_name(), dec_name(),
                    std::isinf(dec.max_abs_error) ? std::string("inf (a value past the type's range becomes infinity)")
                                                  : hexv(dec.max_abs_error),
                    dec.worst_code ? chx(*dec.worst_code) : "-",
                    decv(dec.max_rel_error)));
    L(fmt::format("Encode: {}_encode(x) returns, for every float32 x, the code that lobit's", P));
    L(fmt::format("  ElementFormat::encode(double(x), Rounding::nearest_even, Overflow::{}) returns: the nearest value,",
                  to_string(plan.overflow)));
    L("  a tie to the neighbour whose code is even");
    L("  (both even: the smaller magnitude); overflow past max + half a spacing " +
      std::string(plan.overflow == Overflow::saturate ? "saturates to +-max." : "gives infinity, else NaN, else +-max (README: Rounding, ties and overflow)."));
    L(fmt::format("  +inf -> {}, -inf -> {}, NaN -> {}{}", chx(plan.pos_inf_result), chx(plan.neg_inf_result),
                  chx(plan.nan_result),
                  plan.nan_from_library ? " (the format's NaN code)"
                                        : " (the code +0.0 encodes to; the format has no NaN code and the library refuses NaN input)"));
    L("  Thresholds are the smallest float32 that goes to the upper side (ties folded in), stored as order keys:");
    L("  key(x) = bits(x) for x >= 0, -(bits(x) & 0x7fffffff) for x < 0 (-0 and +0 share key 0). The encoder uses");
    L("  integer comparisons only (a fixed-depth branch-free search), so flush-to-zero modes do not change it.");
    if (sr)
      L(fmt::format("Stochastic: {}_encode_stochastic(x, random_word), the library's Rounding::stochastic (comment below).", P));
    if (scaled)
      L(fmt::format("Block-scaled: {}: blocks of {} elements sharing one {} scale ({}, {} bits); the element format "
                    "is the one above.",
                    scaled->text, scaled->block, scaled->scale->spec(), scaled->scale->family(), scaled->scale->bits()));
    if (has_pack())
      L(fmt::format("Packing: {}_pack / {}_unpack, {} (layout below).", P, P, to_string(o.pack)));
    else
      L(fmt::format("Packing: none generated for {}-bit codes (helpers exist for 2-, 4- and 6-bit codes).", bits()));
    out += close;
    out += "\n";
  }

  void table(const std::string& type, const std::string& name, std::size_t n,
             const std::function<std::pair<std::string, std::string>(std::size_t)>& entry, const std::string& what) {
    auto body = [&](const std::string& decl) {
      out += decl + "[" + std::to_string(n) + "] = {  /* " + what + " */\n";
      for (std::size_t i = 0; i < n; ++i) {
        auto [v, cmt] = entry(i);
        out += "  " + v + (i + 1 < n ? "," : " ") + (cmt.empty() ? "" : "  /* " + comment_safe(cmt) + " */") + "\n";
      }
      out += "};\n";
    };
    if (c_lang()) body("static const " + type + " " + name);
    else if (!cuda()) body("inline constexpr " + type + " " + name);
    else {
      out += "#if defined(__CUDACC__)\n";
      body("static " + std::string(table_space()) + " " + type + " " + name + "_dev");
      out += "#endif\n#if !defined(__CUDA_ARCH__)\n";
      body("inline constexpr " + type + " " + name);
      out += "#endif\n";
    }
  }

  std::size_t table_bytes() const {
    std::size_t b = count() * (idec ? idec->type_bits / 8 + 1 : (dec.type == DecodeType::f32 ? 4 : 2)) + padded() * 4 +
                    (plan.thresholds.size() + 1) * (bits() <= 8 ? 1 : 2);
    if (sr) b += sr->values.size() * (8 + (bits() <= 8 ? 1 : 2));
    return b;
  }
  const char* table_space() const { return table_bytes() <= 60 * 1024 ? "__constant__" : "__device__ const"; }

  void scaled_int_part() {
    const ScaledIntTable& t = *idec;
    const std::string kt = ty(fmt::format("{}int{}_t", t.is_signed ? "" : "u", t.type_bits));
    const std::string name = P + "_decode_k";
    const bool all_numbers = std::all_of(t.number.begin(), t.number.end(), [](bool b) { return b; });
    out += fmt::format("/* Scaled-integer decode: value(code) = {}_decode_k_of(code) * 2^{}_DECODE_EXPONENT, exact for every\n", P, M);
    out += fmt::format(" * finite code.{} */\n", all_numbers ? ""
                       : fmt::format(" NaN, infinity and unused codes hold k = 0; {}_decode_is_number_of(code) is 0 for them.", P));
    out += fmt::format("#define {}_DECODE_EXPONENT ({})\n", M, t.exponent);
    table(kt, name, count(), [&](std::size_t i) {
      const Code c = i;
      const CodeClass k = f.classify(c);
      std::string cm = fmt::format("{} {}", chx(c), to_string(k));
      if (t.number[i]) cm += " " + hexv(f.decode(c));
      return std::pair{fmt::format("{}", t.k[i]), cm};
    }, fmt::format("code -> k (value = k * 2^{})", t.exponent));
    out += fmt::format("{} {} {}_decode_k_of({} code) {{ return {}[code & 0x{:x}u]; }}\n", fn(), kt, P, ty("uint32_t"), tab(name),
                       count() - 1);
    if (!all_numbers) {
      const std::string nn = P + "_decode_is_number";
      table(ty("uint8_t"), nn, count(), [&](std::size_t i) {
        return std::pair{std::string(t.number[i] ? "1" : "0"), fmt::format("{} {}", chx(i), to_string(f.classify(i)))};
      }, "code -> 1 for a finite value");
      out += fmt::format("{} {} {}_decode_is_number_of({} code) {{ return {}[code & 0x{:x}u]; }}\n", fn(), ty("uint8_t"), P,
                         ty("uint32_t"), tab(nn), count() - 1);
    }
  }

  void stochastic_part() {
    const LutStochasticPlan& s = *sr;
    const std::size_t n = s.values.size();
    const std::string vname = P + "_sr_values", cname = P + "_sr_codes", u32 = ty("uint32_t");
    auto lit = [](double v) { return v < 0 ? "(" + hexv(v) + ")" : hexv(v); };
    const double fmax = static_cast<double>(FLT_MAX);
    out += "/*\n";
    out += fmt::format(" * Stochastic rounding: {}_encode_stochastic(x, r) returns, for every float32 x and 32-bit word r, the\n", P);
    out += fmt::format(" * code of lobit's ElementFormat::encode(double(x), Rounding::stochastic, Overflow::{}, r)\n",
                       to_string(f.resolve(o.overflow)));
    out += " * (README: Rounding, ties and overflow). Between neighbouring values a (nearer zero) and b, with\n";
    out += " * t = floor(2^32 * (|x| - |a|) / (|b| - |a|)) computed in binary64 and clamped to [0, 2^32 - 1], x goes\n";
    out += " * to b exactly when t + r >= 2^32 (for minifloats and integers this t is the remainder below the last\n";
    out += " * kept bit truncated to 32 bits, the library's integer definition). A cell spanning zero (a codebook\n";
    out += " * without 0) goes upward when floor(2^32 * (x - lo) / (hi - lo)) + r >= 2^32. Values are exact;\n";
    out += " * inputs past +-max round toward the virtual neighbour beyond it and overflow as the library does.\n";
    out += " * Needs IEEE binary64 arithmetic without flush-to-zero (x87 extended precision would differ; GPUs: fine).\n";
    out += fmt::format(" * NaN -> {}{}, +inf -> {}, -inf -> {}.\n */\n", chx(s.nan_result),
                       s.nan_from_library ? "" : " (the code +0.0 encodes to under nearest-even; the library refuses NaN)", chx(s.pos_inf_result),
                       chx(s.neg_inf_result));
    table("double", vname, n, [&](std::size_t i) { return std::pair{hexv(s.values[i]), fmt::format("[{}] {}", i, decv(s.values[i]))}; },
          "sorted finite values (binary64, exact)");
    table(code_t(), cname, n, [&](std::size_t i) { return std::pair{chx(s.codes[i]), fmt::format("[{}]", i)}; },
          "code of each value");
    out += fmt::format("/* floor(2^32 * (ax - an) / (af - an)) clamped to [0, 2^32 - 1], for an <= ax <= af. */\n");
    out += fmt::format("{} {} {}_sr_fraction(double ax, double an, double af) {{\n", fn(), u32, P);
    out += "  const double t = ((ax - an) / (af - an)) * 4294967296.0;  /* exact scaling by 2^32 */\n";
    out += fmt::format("  if (!(t > 0.0)) return 0u;\n  if (t >= 4294967295.0) return 0xffffffffu;\n  return ({})t;  /* truncation: floor for t > 0 */\n}}\n", u32);
    out += fmt::format("/* t + r >= 2^32 */\n{} int {}_sr_away({} t, {} r) {{ return r > 0xffffffffu - t; }}\n", fn(), P, u32, u32);
    out += fmt::format("{} {} {}_encode_stochastic(float x, {} r) {{\n", fn(), code_t(), P, u32);
    out += fmt::format("  const {} b = {}_float_bits(x);\n", u32, P);
    out += "  const double xd = (double)x;\n  const double ax = xd < 0.0 ? -xd : xd;\n";
    out += fmt::format("  {} lo = 0u, hi = {}u, k;\n", u32, n - 1);
    out += fmt::format("  if ((b & 0x7fffffffu) > 0x7f800000u) return {};  /* NaN */\n", chx(s.nan_result));
    out += fmt::format("  if (b == 0x7f800000u) return {};  /* +inf */\n", chx(s.pos_inf_result));
    out += fmt::format("  if (b == 0xff800000u) return {};  /* -inf */\n", chx(s.neg_inf_result));
    const double top = s.values.back(), bot = s.values.front();
    if (s.upper_virtual && s.upper_overflow_code == s.codes.back())
      out += fmt::format("  if (xd > {}) return {};  /* past max: every overflow saturates */\n", lit(top), chx(s.codes.back()));
    else if (s.upper_virtual)
      out += fmt::format("  if (xd > {}) {{  /* past max: toward the virtual neighbour {} */\n    if (xd >= {}) return {};\n"
                         "    return {}_sr_away({}_sr_fraction(ax, {}, {}), r) ? {} : {};\n  }}\n",
                         lit(top), hexv(*s.upper_virtual), lit(*s.upper_virtual), chx(s.upper_overflow_code), P, P,
                         hexv(std::fabs(top)), hexv(std::fabs(*s.upper_virtual)), chx(s.upper_overflow_code), chx(s.codes.back()));
    else if (top < fmax)
      out += fmt::format("  if (xd > {}) return {};  /* past max: no neighbour beyond, saturate */\n", lit(top), chx(s.codes.back()));
    if (s.lower_virtual && s.lower_overflow_code == s.codes.front())
      out += fmt::format("  if (xd < {}) return {};  /* past -max: every overflow saturates */\n", lit(bot), chx(s.codes.front()));
    else if (s.lower_virtual)
      out += fmt::format("  if (xd < {}) {{  /* past -max: toward the virtual neighbour {} */\n    if (xd <= {}) return {};\n"
                         "    return {}_sr_away({}_sr_fraction(ax, {}, {}), r) ? {} : {};\n  }}\n",
                         lit(bot), hexv(*s.lower_virtual), lit(*s.lower_virtual), chx(s.lower_overflow_code), P, P,
                         hexv(std::fabs(bot)), hexv(std::fabs(*s.lower_virtual)), chx(s.lower_overflow_code), chx(s.codes.front()));
    else if (bot > -fmax)
      out += fmt::format("  if (xd < {}) return {};  /* below the lowest value: saturate */\n", lit(bot), chx(s.codes.front()));
    const std::string V = tab(vname), C = tab(cname);
    out += fmt::format("  while (hi - lo > 1u) {{  /* {}[lo] <= xd <= {}[hi] */\n", vname, vname);
    out += fmt::format("    const {} mid = (lo + hi) >> 1;\n    if ({}[mid] <= xd) lo = mid;\n    else hi = mid;\n  }}\n", u32, V);
    out += fmt::format("  if ({}[lo] == xd) k = lo;\n  else if ({}[hi] == xd) k = hi;\n", V, V);
    out += fmt::format("  else if ({}[lo] >= 0.0) k = {}_sr_away({}_sr_fraction(ax, {}[lo], {}[hi]), r) ? hi : lo;\n", V, P, P, V, V);
    out += fmt::format("  else if ({}[hi] <= 0.0) k = {}_sr_away({}_sr_fraction(ax, -{}[hi], -{}[lo]), r) ? lo : hi;\n", V, P, P, V, V);
    out += fmt::format("  else k = {}_sr_away({}_sr_fraction(xd, {}[lo], {}[hi]), r) ? hi : lo;  /* spans zero: by value, upward */\n",
                       P, P, V, V);
    if (s.zero_index && s.negative_zero_code)
      out += fmt::format("  if (k == {}u && (b >> 31)) return ({}){};  /* negative inputs that round to zero */\n", *s.zero_index,
                         code_t(), chx(*s.negative_zero_code));
    out += fmt::format("  return {}[k];\n}}\n", C);
  }

  void decode_part() {
    if (idec) {
      scaled_int_part();
      return;
    }
    const bool f32 = dec.type == DecodeType::f32;
    const std::string et = ty(f32 ? "uint32_t" : "uint16_t");
    const std::string name = P + "_decode_" + dec_name() + "_bits";
    table(et, name, count(), [&](std::size_t i) {
      const Code c = i;
      const CodeClass k = f.classify(c);
      std::string cm = fmt::format("{} {}", chx(c), to_string(k));
      if (k != CodeClass::unused && k != CodeClass::nan) cm += " " + hexv(f.decode(c));
      return std::pair{f32 ? fmt::format("0x{:08x}u", dec.bits[i]) : fmt::format("0x{:04x}u", dec.bits[i]), cm};
    }, fmt::format("code -> {} bit pattern", dec_name()));
    out += fmt::format("{} {} {}_decode_{}_bits_of({} code) {{ return {}[code & 0x{:x}u]; }}\n", fn(), et, P, dec_name(),
                       ty("uint32_t"), tab(name), count() - 1);
    if (f32)
      out += fmt::format("{} float {}_decode_f32({} code) {{ return {}_float_of({}_decode_f32_bits_of(code)); }}\n",
                         fn(), P, ty("uint32_t"), P, P);
  }

  void bitcast_part() {
    out += fmt::format("{} {} {}_float_bits(float x) {{\n", fn(), ty("uint32_t"), P);
    if (cuda()) out += "#if defined(__CUDA_ARCH__)\n  return __float_as_uint(x);\n#else\n";
    out += fmt::format("  {} b;\n  {}(&b, &x, sizeof b);\n  return b;\n", ty("uint32_t"), c_lang() ? "memcpy" : "std::memcpy");
    if (cuda()) out += "#endif\n";
    out += "}\n";
    out += fmt::format("{} float {}_float_of({} b) {{\n", fn(), P, ty("uint32_t"));
    if (cuda()) out += "#if defined(__CUDA_ARCH__)\n  return __uint_as_float(b);\n#else\n";
    out += fmt::format("  float x;\n  {}(&x, &b, sizeof x);\n  return x;\n", c_lang() ? "memcpy" : "std::memcpy");
    if (cuda()) out += "#endif\n";
    out += "}\n";
    out += fmt::format("/* Order key of a float32 (not for NaN): integers that order like the floats, -0 == +0. */\n");
    out += fmt::format("{} {} {}_order_key({} b) {{\n  const {} m = ({})(b & 0x7fffffffu);\n  return (b >> 31) ? -m : m;\n}}\n",
                       fn(), ty("int32_t"), P, ty("uint32_t"), ty("int32_t"), ty("int32_t"));
  }

  void encode_part() {
    const std::size_t n = plan.thresholds.size(), pp = padded();
    const std::string kname = P + "_encode_up_from_key", sname = P + "_encode_slot_code";
    table(ty("int32_t"), kname, pp - 1, [&](std::size_t i) {
      if (i >= n) return std::pair{std::string("0x7fffffff"), std::string("padding: above every key")};
      const auto& t = plan.thresholds[i];
      const std::int32_t key = float32_order_key(t.up_from_bits);
      std::string exact = t.exact.exact_in_double()
                              ? hexv(t.exact.nearest)
                              : exact_midpoint_decimal(t.below, t.above) + " (not a binary64 number)";
      std::string cm = fmt::format("[{}] up from {}; {} between {} and {}{}: exact {}, a tie goes {}", i,
                                   hexv(f32_of(t.up_from_bits)), t.overflow ? "overflow midpoint" : "midpoint",
                                   hexv(t.below), hexv(t.above), t.overflow ? " (virtual, past max)" : "", exact,
                                   t.exact.tie_to_upper ? "up" : "down");
      return std::pair{key < 0 ? fmt::format("-0x{:08x}", -static_cast<std::int64_t>(key)) : fmt::format("0x{:08x}", key), cm};
    }, "sorted; slot i = number of keys <= key(x)");
    table(code_t(), sname, n + 1, [&](std::size_t i) {
      std::string cm = fmt::format("slot {}", i);
      if (plan.zero_slot && *plan.zero_slot == i) cm += " (zero)";
      return std::pair{chx(plan.slot_codes[i]), cm};
    }, "slot -> code");
    auto prologue = [&](const std::string& name) {
      out += fmt::format("{} {} {}(float x) {{\n", fn(), code_t(), name);
      out += fmt::format("  const {} b = {}_float_bits(x);\n", ty("uint32_t"), P);
      out += fmt::format("  const {} k = {}_order_key(b);\n", ty("int32_t"), P);
      out += fmt::format("  {} i = 0;\n", ty("uint32_t"));
      out += fmt::format("  if ((b & 0x7fffffffu) > 0x7f800000u) return {};  /* NaN */\n", chx(plan.nan_result));
      out += fmt::format("  if (b == 0x7f800000u) return {};  /* +inf */\n", chx(plan.pos_inf_result));
      out += fmt::format("  if (b == 0xff800000u) return {};  /* -inf */\n", chx(plan.neg_inf_result));
    };
    auto epilogue = [&] {
      if (plan.zero_slot && plan.negative_zero_code)
        out += fmt::format("  return (i == {}u && (b >> 31)) ? ({}){} : {}[i];  /* negative inputs that round to zero */\n",
                           *plan.zero_slot, code_t(), chx(*plan.negative_zero_code), tab(sname));
      else
        out += fmt::format("  return {}[i];\n", tab(sname));
      out += "}\n";
    };
    out += fmt::format("/* Nearest-even encode, {} comparisons (a fixed-depth branch-free search). */\n",
                       std::countr_zero(pp));
    prologue(P + "_encode");
    for (std::size_t step = pp / 2; step; step >>= 1)
      out += fmt::format("  i += (k >= {}[i + {}u]) ? {}u : 0u;\n", tab(kname), step - 1, step);
    epilogue();
    if (n <= 64) {
      out += fmt::format("/* The same encoder as a branch-free comparison count over all {} thresholds. */\n", n);
      prologue(P + "_encode_by_count");
      out += fmt::format("  {{\n    {} j;\n    for (j = 0; j < {}u; ++j) i += ({})(k >= {}[j]);\n  }}\n", ty("uint32_t"), n,
                         ty("uint32_t"), tab(kname));
      epilogue();
    }
  }

  void pack_part() {
    const int b = bits();
    const int g = b == 6 ? 4 : 8 / b;  // codes per group
    const int G = g * b / 8;           // bytes per group
    const bool lo = o.pack == PackOrder::lo_first;
    const std::string u8 = ty("uint8_t"), u32 = ty("uint32_t"), sz = ty("size_t");
    // Layout drawing.
    out += "/*\n * Packing (" + std::string(to_string(o.pack)) + "): the codes form one bit stream; code i holds stream bits\n";
    out += fmt::format(" * {}*i .. {}*i+{}, and stream bit s is bit {} of byte s/8 ({}).\n", b, b, b - 1,
                       lo ? "s%8" : "7 - s%8", lo ? "least significant bit first" : "most significant bit first");
    out += fmt::format(" * {} codes per {} byte{}; n codes take {}_PACKED_BYTES(n) = (n*{} + 7)/8 bytes, unused tail bits 0.\n",
                       g, G, G > 1 ? "s" : "", M, b);
    for (int q = 0; q < G; ++q) {
      std::string head = fmt::format(" *   byte {}: bit ", q), row = " *           ";
      for (int bit = 7; bit >= 0; --bit) head += fmt::format("{:<5}", bit);
      // Which code and code bit sits at each byte bit.
      std::string cells;
      for (int bit = 7; bit >= 0; --bit) {
        const int s = q * 8 + (lo ? bit : 7 - bit);
        const int code = s / b, cb = lo ? s % b : b - 1 - s % b;
        cells += fmt::format("c{}.{}", code, cb) + (bit ? " " : "");
      }
      while (!head.empty() && head.back() == ' ') head.pop_back();
      out += head + "\n * " + fmt::format("              {}\n", cells);
      (void)row;
    }
    out += " *   (cI.J = bit J of code I of the group; bit 0 is the least significant)\n */\n";
    out += fmt::format("#define {}_PACKED_BYTES(n) ((((size_t)(n)) * {}u + 7u) / 8u)\n", M, b);
    // Group pack/unpack through a 32-bit word.
    out += fmt::format("{} void {}_pack_group(const {}* c, {}* out) {{\n", fn(), P, u8, u8);
    out += fmt::format("  const {} w =", u32);
    for (int t = 0; t < g; ++t)
      out += fmt::format("{} (({})(c[{}] & 0x{:x}u) << {})", t ? " |" : "", u32, t, (1 << b) - 1, lo ? b * t : b * (g - 1 - t));
    out += ";\n";
    for (int q = 0; q < G; ++q) out += fmt::format("  out[{}] = ({})(w >> {});\n", q, u8, lo ? 8 * q : 8 * (G - 1 - q));
    out += "}\n";
    out += fmt::format("{} void {}_unpack_group(const {}* in, {}* c) {{\n", fn(), P, u8, u8);
    out += fmt::format("  const {} w =", u32);
    for (int q = 0; q < G; ++q) out += fmt::format("{} (({})in[{}] << {})", q ? " |" : "", u32, q, lo ? 8 * q : 8 * (G - 1 - q));
    out += ";\n";
    for (int t = 0; t < g; ++t)
      out += fmt::format("  c[{}] = ({})((w >> {}) & 0x{:x}u);\n", t, u8, lo ? b * t : b * (g - 1 - t), (1 << b) - 1);
    out += "}\n";
    out += fmt::format("/* Packs n codes (each < 2^{}) into {}_PACKED_BYTES(n) bytes. */\n", b, M);
    out += fmt::format("{} void {}_pack(const {}* codes, {} n, {}* out) {{\n", fn(), P, u8, sz, u8);
    out += fmt::format("  {} i = 0, o = 0, t;\n", sz);
    out += fmt::format("  for (; i + {} <= n; i += {}, o += {}) {}_pack_group(codes + i, out + o);\n", g, g, G, P);
    out += "  if (i < n) {\n";
    out += fmt::format("    {} c[{}] = {{0}};\n    {} b[{}] = {{0}};\n", u8, g, u8, G);
    out += "    for (t = 0; i + t < n; ++t) c[t] = codes[i + t];\n";
    out += fmt::format("    {}_pack_group(c, b);\n", P);
    out += fmt::format("    for (t = 0; t < ((n - i) * {} + 7) / 8; ++t) out[o + t] = b[t];\n", b);
    out += "  }\n}\n";
    out += fmt::format("/* Unpacks n codes from {}_PACKED_BYTES(n) bytes (reads no byte past them). */\n", M);
    out += fmt::format("{} void {}_unpack(const {}* in, {} n, {}* codes) {{\n", fn(), P, u8, sz, u8);
    out += fmt::format("  {} i = 0, o = 0, t;\n", sz);
    out += fmt::format("  for (; i + {} <= n; i += {}, o += {}) {}_unpack_group(in + o, codes + i);\n", g, g, G, P);
    out += "  if (i < n) {\n";
    out += fmt::format("    {} c[{}] = {{0}};\n    {} b[{}] = {{0}};\n", u8, g, u8, G);
    out += fmt::format("    for (t = 0; t < ((n - i) * {} + 7) / 8; ++t) b[t] = in[o + t];\n", b);
    out += fmt::format("    {}_unpack_group(b, c);\n", P);
    out += "    for (t = 0; i + t < n; ++t) codes[i + t] = c[t];\n";
    out += "  }\n}\n";
  }

  void block_part();

  std::string code_header() {
    header_comment("/*", " * ", " */");
    const std::string guard = M + "_H";
    out += "#ifndef " + guard + "\n#define " + guard + "\n";
    if (c_lang()) out += "#include <stddef.h>\n#include <stdint.h>\n#include <string.h>\n";
    else out += "#include <cstddef>\n#include <cstdint>\n#include <cstring>\n";
    out += fmt::format("#define {}_BITS {}\n#define {}_CODE_COUNT {}u\n", M, bits(), M, count());
    if (cuda()) {
      out += fmt::format("#if defined(__CUDACC__)\n#define {}_HD __host__ __device__\n#else\n#define {}_HD\n#endif\n", M, M);
      out += fmt::format("/* Device code reads the {} tables (*_dev), host code the constexpr copies. */\n",
                         table_space());
      out += fmt::format("#if defined(__CUDA_ARCH__)\n#define {}_TABLE(name) name##_dev\n#else\n#define {}_TABLE(name) name\n#endif\n",
                         M, M);
    }
    if (!c_lang()) out += "namespace " + o.cpp_namespace + " {\n";
    bitcast_part();
    decode_part();
    encode_part();
    if (sr) stochastic_part();
    if (has_pack()) pack_part();
    if (scaled) block_part();
    if (!c_lang()) out += "}  // namespace " + o.cpp_namespace + "\n";
    out += "#endif /* " + guard + " */\n";
    return out;
  }

  std::string json() {
    auto q = [](const std::string& s) { return json_string(s); };
    out += "{\n";
    out += fmt::format("  \"generator\": {},\n", q(fmt::format("lobit {}", version())));
    out += fmt::format("  \"command\": {},\n", q(o.command));
    out += fmt::format("  \"format\": {},\n  \"title\": {},\n  \"family\": {},\n  \"bits\": {},\n", q(f.spec()), q(title()),
                       q(std::string(f.family())), bits());
    out += fmt::format("  \"overflow\": {},\n  \"rounding\": \"nearest-even\",\n", q(std::string(to_string(plan.overflow))));
    out += fmt::format("  \"max_finite\": {},\n  \"lowest_finite\": {},\n", q(hexv(props.max_finite)), q(hexv(props.lowest_finite)));
    out += fmt::format("  \"decode_type\": {},\n  \"decode_exact\": {},\n", q(dec_name()), dec.exact ? "true" : "false");
    if (!dec.exact) out += fmt::format("  \"decode_max_abs_error\": {},\n", q(hexv(dec.max_abs_error)));
    out += fmt::format("  \"nan_input_code\": {},\n  \"nan_input_from_library\": {},\n", plan.nan_result,
                       plan.nan_from_library ? "true" : "false");
    out += fmt::format("  \"pos_inf_code\": {},\n  \"neg_inf_code\": {},\n", plan.pos_inf_result, plan.neg_inf_result);
    out += fmt::format("  \"negative_zero_code\": {},\n", plan.negative_zero_code ? std::to_string(*plan.negative_zero_code) : "null");
    out += "  \"codes\": [\n";
    for (Code c = 0; c < count(); ++c) {
      const CodeClass k = f.classify(c);
      const bool val = k != CodeClass::unused && k != CodeClass::nan;
      out += fmt::format("    {{\"code\": {}, \"class\": {}, \"value\": {}, \"decode_bits\": {}}}{}\n", c,
                         q(std::string(to_string(k))), val ? q(hexv(f.decode(c))) : "null", dec.bits[c],
                         c + 1 < count() ? "," : "");
    }
    out += "  ],\n  \"thresholds\": [\n";
    for (std::size_t i = 0; i < plan.thresholds.size(); ++i) {
      const auto& t = plan.thresholds[i];
      out += fmt::format(
          "    {{\"below\": {}, \"above\": {}, \"overflow\": {}, \"exact\": {}, \"nearest_binary64\": {}, \"residual\": {}, "
          "\"tie\": {}, \"float32_up_from\": {}, \"float32_up_from_bits\": {}, \"code_below\": {}, \"code_above\": {}}}{}\n",
          q(hexv(t.below)), q(hexv(t.above)), t.overflow ? "true" : "false",
          q(t.exact.exact_in_double() ? hexv(t.exact.nearest) : exact_midpoint_decimal(t.below, t.above)),
          q(hexv(t.exact.nearest)), t.exact.residual, q(t.exact.tie_to_upper ? "up" : "down"),
          q(hexv(f32_of(t.up_from_bits))), t.up_from_bits, plan.slot_codes[i], plan.slot_codes[i + 1],
          i + 1 < plan.thresholds.size() ? "," : "");
    }
    out += "  ]\n}\n";
    return out;
  }

  std::string csv() {
    out += "kind,index,code,class,value,decode_bits,below,above,exact,tie,float32_up_from\n";
    for (Code c = 0; c < count(); ++c) {
      const CodeClass k = f.classify(c);
      const bool val = k != CodeClass::unused && k != CodeClass::nan;
      out += fmt::format("code,{},{},{},{},0x{:0{}x},,,,,\n", c, chx(c), to_string(k), val ? hexv(f.decode(c)) : "",
                         dec.bits[c], dec.type == DecodeType::f32 ? 8 : 4);
    }
    for (std::size_t i = 0; i < plan.thresholds.size(); ++i) {
      const auto& t = plan.thresholds[i];
      out += fmt::format("{},{},,,,,{},{},{},{},{}\n", t.overflow ? "overflow-threshold" : "threshold", i, hexv(t.below),
                         hexv(t.above),
                         csv_field(t.exact.exact_in_double() ? hexv(t.exact.nearest) : exact_midpoint_decimal(t.below, t.above)),
                         t.exact.tie_to_upper ? "up" : "down", hexv(f32_of(t.up_from_bits)));
    }
    return out;
  }
};

void Emitter::block_part() {
  const ScaledFormat& sf = *scaled;
  const ElementFormat& sc = *sf.scale;
  const int k = sf.block, sbytes = (sc.bits() + 7) / 8;
  const int cbytes = bits() == 8 ? k : static_cast<int>((static_cast<long>(k) * bits() + 7) / 8);
  // The scale's decode table, under its own prefix (and this header's macros).
  Emitter se{sc, o, plan_encode(sc, Overflow::format_default), decode_table(sc, DecodeType::f32), properties(sc), {}, {}, {}, {}};
  se.stem = stem + "_scale";
  se.P = P + "_scale";
  se.M = M;
  out += fmt::format("/* The block scale: {} ({} bits), code -> float32. */\n", comment_safe(sc.spec()), sc.bits());
  se.bitcast_part();
  se.decode_part();
  out += se.out;
  const std::string u8 = ty("uint8_t"), u32 = ty("uint32_t");
  out += "/*\n";
  out += fmt::format(" * Block layout of {}: the OCP Microscaling definition (OCP MX v1.0, section 5.1): k = {} elements\n",
                     comment_safe(sf.text), k);
  out += " * P_i share one scale X; element i stands for X * P_i. Stored here as (byte offsets):\n";
  out += fmt::format(" *   [0, {})   scale code{}\n", sbytes, sbytes > 1 ? " (little-endian)" : "");
  out += fmt::format(" *   [{}, {})  the {} element codes{}\n", sbytes, sbytes + cbytes, k,
                     bits() == 8 ? ", one per byte" : fmt::format(", packed as {}_pack does (layout above)", P));
  out += fmt::format(" * {} bytes in all, no padding (every member is a byte array).\n", sbytes + cbytes);
  out += " * Dequantize: value_i = float32(X * P_i). X and P_i are float32 numbers, so one float32 multiplication\n";
  out += " * is the library's binary64 product rounded once to float32 (lobit/scale/quantize.hpp), overflow to\n";
  out += " * infinity and float32 subnormals included (compile without flush-to-zero; nvcc's default -ftz=false).\n";
  if (sc.nan_code())
    out += fmt::format(" * A NaN scale (code {}) makes the whole block NaN.\n", code_hex(*sc.nan_code(), sc.bits()));
  else
    out += " * The scale format has no NaN code: a group the library marks NaN (a NaN or infinity among its inputs)\n"
           " * cannot be stored in this layout; its bytes hold an ordinary scale code and dequantize to numbers.\n";
  out += " */\n";
  out += fmt::format("#define {}_BLOCK_SIZE {}\n#define {}_BLOCK_BYTES {}\n", M, k, M, sbytes + cbytes);
  if (c_lang())
    out += fmt::format("typedef struct {{\n  uint8_t scale[{}];\n  uint8_t codes[{}];\n}} {}_block;\n", sbytes, cbytes, P);
  else
    out += fmt::format("struct {}_block {{\n  {} scale[{}];\n  {} codes[{}];\n}};\nstatic_assert(sizeof({}_block) == {}, \"no padding\");\n",
                       P, u8, sbytes, u8, cbytes, P, sbytes + cbytes);
  out += fmt::format("{} {} {}_block_scale_code(const {}_block* b) {{ return ", fn(), u32, P, P);
  for (int q = 0; q < sbytes; ++q) out += fmt::format("{}(({})b->scale[{}] << {})", q ? " | " : "", u32, q, 8 * q);
  out += "; }\n";
  out += fmt::format("{} void {}_dequantize_block(const {}_block* b, float* out) {{\n", fn(), P, P);
  out += fmt::format("  const float s = {}_scale_decode_f32({}_block_scale_code(b));\n", P, P);
  out += fmt::format("  {} i;\n", ty("size_t"));
  if (bits() == 8) {
    out += fmt::format("  for (i = 0; i < {}u; ++i) out[i] = s * {}_decode_f32(b->codes[i]);\n", k, P);
  } else {
    out += fmt::format("  {} c[{}];\n  {}_unpack(b->codes, {}u, c);\n", u8, k, P, k);
    out += fmt::format("  for (i = 0; i < {}u; ++i) out[i] = s * {}_decode_f32(c[i]);\n", k, P);
  }
  out += "}\n";
}

}  // namespace

std::string emit_lut_impl(const ElementFormat& f, const LutOptions& o, const ScaledFormat* scaled);

std::string emit_block_lut(const ScaledFormat& sf, const LutOptions& o) {
  const std::string where = "format '" + (o.title.empty() ? sf.text : o.title) + "'";
  if (o.language == LutLanguage::json || o.language == LutLanguage::csv)
    throw usage_error("json and csv output is for element formats", where, "give the element format for data tables");
  if (sf.granularity != Granularity::block || !sf.scale)
    throw usage_error("only blocks of k elements with a stored scale (ELEMENT@K:SCALE) have a block layout", where,
                      "give the element format alone, or a block format such as e2m1@32:e8m0");
  if (sf.tensor_scale || sf.zero || sf.scales || sf.sub_block)
    throw usage_error("block layouts are generated for plain block scaling only (no tensor-scale, zero, scales or sub)",
                      where, "drop the option, or generate the element format alone");
  const int b = sf.element->bits();
  if (b != 2 && b != 4 && b != 6 && b != 8)
    throw usage_error(fmt::format("block layouts are generated for 2-, 4-, 6- and 8-bit elements; this one has {}", b), where,
                      "generate the element format alone");
  if (sf.scale->bits() > 16)
    throw usage_error(fmt::format("the block scale {} has {} bits; a scale table needs at most 16", sf.scale->spec(),
                                  sf.scale->bits()),
                      where, "use an 8- or 16-bit scale format (e8m0, e4m3, fp16, bf16)");
  if (!decode_table(*sf.element, DecodeType::f32).exact || !decode_table(*sf.scale, DecodeType::f32).exact)
    throw usage_error("the element or scale values are not all float32 numbers; the float32 dequantize would round", where,
                      "use formats whose values float32 holds");
  if (o.decode_type == DecodeType::scaled_int)
    throw usage_error("block layouts dequantize in float32", "--decode-type int",
                      "drop --decode-type, or generate the element format alone");
  LutOptions eo = o;
  eo.decode_type = DecodeType::f32;  // dequantize works in float32
  if (eo.title.empty()) eo.title = sf.text;
  return emit_lut_impl(*sf.element, eo, &sf);
}

std::string emit_lut(const ElementFormat& f, const LutOptions& o) { return emit_lut_impl(f, o, nullptr); }

std::string emit_lut_impl(const ElementFormat& f, const LutOptions& o, const ScaledFormat* scaled) {
  require_table_width(f);
  if ((o.language == LutLanguage::cpp || o.language == LutLanguage::cuda) && !valid_namespace(o.cpp_namespace))
    throw usage_error(fmt::format("'{}' is not a C++ namespace name", o.cpp_namespace), "--namespace",
                      "use identifiers joined by ::, e.g. kernels::fp8");
  if (o.decode_type == DecodeType::scaled_int && (o.language == LutLanguage::json || o.language == LutLanguage::csv))
    throw usage_error("the scaled-integer decode table is generated for c, cpp and cuda", "--decode-type int",
                      "json and csv already give each code's exact value; use --lang c, cpp or cuda");
  if (o.stochastic && (o.language == LutLanguage::json || o.language == LutLanguage::csv))
    throw usage_error("the stochastic encoder is code: it is generated for c, cpp and cuda", "--stochastic",
                      "use --lang c, cpp or cuda");
  Emitter e{f, o, plan_encode(f, o.overflow), decode_table(f, o.decode_type), properties(f), {}, {}, {}, {}};
  if (o.decode_type == DecodeType::scaled_int && !scaled) e.idec = scaled_int_table(f);
  if (o.stochastic) e.sr = plan_stochastic(f, o.overflow);
  if (!e.dec.exact && !o.allow_inexact && !e.idec)
    throw usage_error(fmt::format("{} cannot hold every value of this format exactly ({} at code {})",
                                  to_string(o.decode_type),
                                  std::isinf(e.dec.max_abs_error) ? std::string("a value past its range")
                                                                  : "largest error " + hexv(e.dec.max_abs_error),
                                  e.dec.worst_code ? code_hex(*e.dec.worst_code, f.bits()) : "-"),
                      "--decode-type", "pick a wider type (f32), or pass --allow-inexact to emit rounded values");
  e.stem = o.stem.empty() ? lut_identifier_stem(o.title.empty() ? f.spec() : o.title) : lut_identifier_stem(o.stem);
  e.P = "lobit_" + e.stem;
  e.scaled = scaled;
  e.M = "LOBIT_";
  for (char ch : e.stem) e.M += static_cast<char>(std::toupper(static_cast<unsigned char>(ch)));
  switch (o.language) {
    case LutLanguage::json: return e.json();
    case LutLanguage::csv: return e.csv();
    default: return e.code_header();
  }
}

ProductTable product_table(const ElementFormat& a, const ElementFormat& b) {
  if (a.bits() > 4 || b.bits() > 4)
    throw usage_error(fmt::format("product tables are for formats of at most 4 bits (these have {} and {})", a.bits(), b.bits()),
                      a.spec() + " x " + b.spec(), "a 16 x 16 table is the point; wider pairs need a multiplier");
  ProductTable t;
  t.bits_a = a.bits();
  t.bits_b = b.bits();
  const Code na = Code{1} << a.bits(), nb = Code{1} << b.bits();
  std::vector<double> prod;
  bool all_finite = true;
  for (Code ca = 0; ca < na; ++ca)
    for (Code cb = 0; cb < nb; ++cb) {
      const double va = a.decode(ca), vb = b.decode(cb);
      const double p = va * vb;  // binary64; checked exact below where finite
      if (std::isnan(p)) {
        t.f32_bits.push_back(0x7fc00000u);
        all_finite = false;
        prod.push_back(p);
        continue;
      }
      if (std::isfinite(va) && std::isfinite(vb) && (!std::isfinite(p) || std::fma(va, vb, -p) != 0))
        throw usage_error("a product is not a binary64 number", a.spec() + " x " + b.spec(), "no exact table exists");
      const float pf = static_cast<float>(p);
      if (std::isfinite(p) && static_cast<double>(pf) != p)
        throw usage_error(fmt::format("the product {} is not a float32 number", hexv(p)), a.spec() + " x " + b.spec(),
                          "no exact float32 table exists for this pair");
      if (!std::isfinite(p)) all_finite = false;
      t.f32_bits.push_back(f32_bits(pf));
      prod.push_back(p);
    }
  if (all_finite) {
    // Common exponent: the lowest set bit over all nonzero products.
    int e = std::numeric_limits<int>::max();
    for (double p : prod) {
      if (p == 0) continue;
      int ex;
      double m = std::frexp(std::fabs(p), &ex);  // p = m * 2^ex, m in [0.5, 1)
      int low = ex - 53;
      double scaled = std::ldexp(m, 53);
      while (std::fmod(scaled, 2.0) == 0) scaled /= 2, ++low;
      e = std::min(e, low);
    }
    if (e == std::numeric_limits<int>::max()) e = 0;
    bool fits = true;
    std::int64_t kmax = 0;
    for (double p : prod) {
      const double kd = std::ldexp(p, -e);
      if (std::fabs(kd) >= 0x1p31) fits = false;
      t.k.push_back(fits ? static_cast<std::int64_t>(kd) : 0);
      kmax = std::max<std::int64_t>(kmax, fits ? std::llabs(static_cast<std::int64_t>(kd)) : 0);
    }
    if (fits) {
      t.integer = true;
      t.exponent = e;
      int w = 1;
      while ((std::int64_t{1} << (w - 1)) <= kmax) ++w;  // two's complement: -2^(w-1) .. 2^(w-1)-1 holds +-kmax
      t.product_bits = w;
    } else {
      t.k.clear();
    }
  }
  return t;
}

namespace {

// Data-only product tables: every entry with its codes, exact value, float32 bits and (integer form) k.
std::string product_data(const ElementFormat& a, const ElementFormat& b, const ProductTable& t, const LutOptions& o) {
  const std::size_t n = t.f32_bits.size();
  auto value = [&](std::size_t i) { return static_cast<double>(f32_of(t.f32_bits[i])); };
  std::string out;
  if (o.language == LutLanguage::csv) {
    out += "index,code_a,code_b,value,f32_bits,k\n";
    for (std::size_t i = 0; i < n; ++i) {
      const Code ca = i >> b.bits(), cb = i & ((Code{1} << b.bits()) - 1);
      const double v = value(i);
      out += fmt::format("{},{},{},{},0x{:08x},{}\n", i, code_hex(ca, a.bits()), code_hex(cb, b.bits()),
                         std::isnan(v) ? "" : hexv(v), t.f32_bits[i], t.integer ? std::to_string(t.k[i]) : "");
    }
    return out;
  }
  auto q = [](const std::string& x) { return json_string(x); };
  out += "{\n";
  out += fmt::format("  \"generator\": {},\n", q(fmt::format("lobit {}", version())));
  out += fmt::format("  \"command\": {},\n", q(o.command));
  out += fmt::format("  \"kind\": \"product\",\n  \"format_a\": {},\n  \"format_b\": {},\n", q(a.spec()), q(b.spec()));
  out += fmt::format("  \"bits_a\": {},\n  \"bits_b\": {},\n", a.bits(), b.bits());
  out += fmt::format("  \"index\": {},\n", q(fmt::format("(code_a << {}) | code_b", b.bits())));
  out += fmt::format("  \"integer\": {},\n", t.integer ? "true" : "false");
  if (t.integer) out += fmt::format("  \"exponent\": {},\n  \"product_bits\": {},\n", t.exponent, t.product_bits);
  out += "  \"entries\": [\n";
  for (std::size_t i = 0; i < n; ++i) {
    const Code ca = i >> b.bits(), cb = i & ((Code{1} << b.bits()) - 1);
    const double v = value(i);
    out += fmt::format("    {{\"index\": {}, \"code_a\": {}, \"code_b\": {}, \"value\": {}, \"f32_bits\": {}, \"k\": {}}}{}\n", i, ca,
                       cb, std::isnan(v) ? "null" : q(hexv(v)), t.f32_bits[i], t.integer ? std::to_string(t.k[i]) : "null",
                       i + 1 < n ? "," : "");
  }
  out += "  ]\n}\n";
  return out;
}

}  // namespace

std::string emit_product_lut(const ElementFormat& a, const ElementFormat& b, const LutOptions& o) {
  if (o.language == LutLanguage::json || o.language == LutLanguage::csv) return product_data(a, b, product_table(a, b), o);
  if ((o.language == LutLanguage::cpp || o.language == LutLanguage::cuda) && !valid_namespace(o.cpp_namespace))
    throw usage_error(fmt::format("'{}' is not a C++ namespace name", o.cpp_namespace), "--namespace",
                      "use identifiers joined by ::, e.g. kernels::fp8");
  const ProductTable t = product_table(a, b);
  const std::string stem = lut_identifier_stem(o.stem.empty() ? (o.title.empty() ? a.spec() + "_x_" + b.spec() : o.title) : o.stem);
  const std::string P = "lobit_" + stem;
  std::string M = "LOBIT_";
  for (char ch : stem) M += static_cast<char>(std::toupper(static_cast<unsigned char>(ch)));
  const bool c = o.language == LutLanguage::c, cuda = o.language == LutLanguage::cuda;
  auto ty = [&](std::string_view x) { return c ? std::string(x) : "std::" + std::string(x); };
  const std::string fn = c ? "static inline" : (cuda ? M + "_HD inline" : "inline");
  const std::size_t n = t.f32_bits.size();
  std::string out = "/*\n";
  auto L = [&](const std::string& x) { out += " * " + comment_safe(x) + "\n"; };
  L(fmt::format("Generated by lobit {}; do not edit. The command that generated this file:", version()));
  L("  " + o.command);
  L(fmt::format("Product table: A = {} ({} bits) times B = {} ({} bits): entry (code_a << {}) | code_b", a.spec(), a.bits(),
                b.spec(), b.bits(), b.bits()));
  L("  is decode_a(code_a) * decode_b(code_b), exact (every product is a float32 number; NaN where a factor is NaN");
  L("  or unused, and IEEE 754 rules for infinities: inf * 0 is NaN).");
  if (t.integer) {
    L(fmt::format("Integer form: product = {}_product_k[i] * 2^({}); every k fits in {} bits (two's complement),", P,
                  t.exponent, t.product_bits));
    L(fmt::format("  so an integer accumulator of {} + ceil(log2(N)) bits holds the exact sum of N products.", t.product_bits));
  } else {
    L("Integer form: none (a product is not finite, or k would need more than 32 bits).");
  }
  out += " */\n";
  out += "#ifndef " + M + "_H\n#define " + M + "_H\n";
  out += c ? "#include <stdint.h>\n#include <string.h>\n" : "#include <cstdint>\n#include <cstring>\n";
  out += fmt::format("#define {}_INDEX(code_a, code_b) ((((unsigned)(code_a) & 0x{:x}u) << {}) | ((unsigned)(code_b) & 0x{:x}u))\n",
                     M, (1u << a.bits()) - 1, b.bits(), (1u << b.bits()) - 1);
  if (t.integer) out += fmt::format("#define {}_PRODUCT_EXPONENT ({})\n#define {}_PRODUCT_BITS {}\n", M, t.exponent, M, t.product_bits);
  if (cuda) {
    out += fmt::format("#if defined(__CUDACC__)\n#define {}_HD __host__ __device__\n#else\n#define {}_HD\n#endif\n", M, M);
    out += fmt::format("#if defined(__CUDA_ARCH__)\n#define {}_TABLE(name) name##_dev\n#else\n#define {}_TABLE(name) name\n#endif\n", M, M);
  }
  if (!c) out += "namespace " + o.cpp_namespace + " {\n";
  auto table = [&](const std::string& type, const std::string& name, auto&& value) {
    auto body = [&](const std::string& decl) {
      out += decl + "[" + std::to_string(n) + "] = {\n";
      for (std::size_t i = 0; i < n; ++i) {
        const Code ca = i >> b.bits(), cb = i & ((Code{1} << b.bits()) - 1);
        out += "  " + value(i) + (i + 1 < n ? "," : " ") +
               fmt::format("  /* {} x {} = {} */\n", code_hex(ca, a.bits()), code_hex(cb, b.bits()),
                           hexv(static_cast<double>(f32_of(t.f32_bits[i]))));
      }
      out += "};\n";
    };
    if (c) body("static const " + type + " " + name);
    else if (!cuda) body("inline constexpr " + type + " " + name);
    else {
      out += "#if defined(__CUDACC__)\n";
      body("static __constant__ " + type + " " + name + "_dev");
      out += "#endif\n#if !defined(__CUDA_ARCH__)\n";
      body("inline constexpr " + type + " " + name);
      out += "#endif\n";
    }
  };
  auto tab = [&](const std::string& name) { return cuda ? M + "_TABLE(" + name + ")" : name; };
  table(ty("uint32_t"), P + "_product_f32_bits", [&](std::size_t i) { return fmt::format("0x{:08x}u", t.f32_bits[i]); });
  out += fmt::format("{} {} {}_product_f32_bits_of({} code_a, {} code_b) {{ return {}[{}_INDEX(code_a, code_b)]; }}\n", fn,
                     ty("uint32_t"), P, ty("uint32_t"), ty("uint32_t"), tab(P + "_product_f32_bits"), M);
  out += fmt::format("{} float {}_product_f32({} code_a, {} code_b) {{\n  const {} b = {}_product_f32_bits_of(code_a, code_b);\n", fn, P,
                     ty("uint32_t"), ty("uint32_t"), ty("uint32_t"), P);
  if (cuda) out += "#if defined(__CUDA_ARCH__)\n  return __uint_as_float(b);\n#else\n";
  out += fmt::format("  float x;\n  {}(&x, &b, sizeof x);\n  return x;\n", c ? "memcpy" : "std::memcpy");
  if (cuda) out += "#endif\n";
  out += "}\n";
  if (t.integer) {
    const bool narrow = t.product_bits <= 16;
    const std::string kt = ty(narrow ? "int16_t" : "int32_t");
    table(kt, P + "_product_k", [&](std::size_t i) { return fmt::format("{}", t.k[i]); });
    out += fmt::format("{} {} {}_product_k_of({} code_a, {} code_b) {{ return {}[{}_INDEX(code_a, code_b)]; }}\n", fn, kt, P,
                       ty("uint32_t"), ty("uint32_t"), tab(P + "_product_k"), M);
  }
  if (!c) out += "}  // namespace " + o.cpp_namespace + "\n";
  out += "#endif /* " + M + "_H */\n";
  return out;
}

}  // namespace lobit::emit
