// `lobit inspect FORMAT`: properties, exact decision thresholds and the full code table.
#include <cmath>
#include <fmt/format.h>

#include "common.hpp"
#include "lobit/error.hpp"
#include "lobit/format/minifloat.hpp"
#include "lobit/format/properties.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/format/value_table.hpp"
#include "lobit/scale/scaled_format.hpp"

namespace lobit::cli {

namespace {

struct Bound {
  std::optional<Threshold> t;  // empty: unbounded
  bool closed = false;
};

std::string bound_text(const Bound& b, bool low) {
  if (!b.t) return low ? "(-inf" : "+inf)";
  std::string v = number_text(b.t->nearest);
  if (!b.t->exact_in_double()) v = "~" + v;  // exact value in the JSON output
  return low ? (b.closed ? "[" : "(") + v : v + (b.closed ? "]" : ")");
}

nlohmann::json bound_json(const Bound& b) {
  if (!b.t) return nullptr;
  return {{"value", b.t->nearest}, {"exact_in_binary64", b.t->exact_in_double()}, {"closed", b.closed}};
}

// The input interval that nearest-even rounding (with overflow policy o) sends to code c.
struct Interval {
  Bound low, high;
  bool any = false;
};

Interval interval_for(const ElementFormat& f, const ValueTable& t, Code c, Overflow o) {
  Interval iv;
  const CodeClass k = f.classify(c);
  if (k == CodeClass::nan || k == CodeClass::unused) return iv;
  const auto& vals = t.values();
  const auto& th = t.thresholds();
  const bool special = f.resolve(o) == Overflow::special;
  if (k == CodeClass::infinity) {
    const bool pos = f.decode(c) > 0;
    const auto& ov = pos ? t.upper_overflow() : t.lower_overflow();
    if (!special || !ov) return iv;
    iv.any = true;
    if (pos) iv.low = {ov, ov->tie_to_upper}, iv.high = {};
    else iv.low = {}, iv.high = {ov, !ov->tie_to_upper};
    return iv;
  }
  const double v = f.decode(c);
  const std::size_t i = t.index_of_value(v);
  iv.any = true;
  if (i > 0) iv.low = {th[i - 1], th[i - 1].tie_to_upper};
  else if (special && t.lower_overflow() && (f.has_infinity() || f.nan_code()))
    iv.low = {t.lower_overflow(), t.lower_overflow()->tie_to_upper};
  if (i + 1 < vals.size()) iv.high = {th[i], !th[i].tie_to_upper};
  else if (special && t.upper_overflow() && (f.has_infinity() || f.nan_code()))
    iv.high = {t.upper_overflow(), !t.upper_overflow()->tie_to_upper};
  if (v == 0 && f.has_negative_zero()) {
    Threshold z;  // zero itself splits the interval by the input's sign
    z.nearest = std::signbit(v) ? -0.0 : 0.0;
    if (std::signbit(v)) iv.high = {z, true};
    else iv.low = {z, true};
  }
  return iv;
}

std::string fmt_opt(const std::optional<double>& v) {
  if (!v) return "none";
  return fmt::format("{}  ({})", number_text(*v), hex_text(*v));
}

void print_text(const ElementFormat& f, const Preset* preset, const FormatProperties& p,
                const ValueTable* t, Overflow o, bool codes) {
  fmt::print("format            {}\n", f.spec());
  if (preset) {
    fmt::print("preset            {}: {}\n", preset->name, preset->summary);
    fmt::print("defined by        {}\n", preset->source);
  }
  std::string layout = fmt::format("{} bits", f.bits());
  if (auto* m = dynamic_cast<const Minifloat*>(&f)) {
    const auto& mp = m->params();
    layout += fmt::format(" = sign {} + exponent {} + mantissa {}; bias {}; subnormals {}", mp.sign ? 1 : 0,
                          mp.exp_bits, mp.man_bits, mp.bias, mp.subnormals ? "on" : "off");
  }
  fmt::print("layout            {}\n", layout);
  fmt::print("max finite        {}\n", fmt_opt(p.max_finite));
  fmt::print("lowest finite     {}\n", fmt_opt(p.lowest_finite));
  if (f.family() == "float" || f.family() == "pow2") fmt::print("min normal        {}\n", fmt_opt(p.min_normal));
  fmt::print("min subnormal     {}\n", fmt_opt(p.min_subnormal));
  fmt::print("min positive      {}\n", fmt_opt(p.min_positive));
  fmt::print("distinct finite   {} (+0 and -0 count once)\n", p.distinct_finite);
  fmt::print("dynamic range     {:.6g} binades (log2 of max finite / min positive)\n", p.dynamic_range_binades);
  fmt::print("relative spacing  {:.6g} .. {:.6g} (gap to the next value / value, {})\n", p.rel_spacing_min,
             p.rel_spacing_max, (f.family() == "float" || f.family() == "pow2") ? "normal range" : "positive values");
  std::string specials;
  if (p.infinity_codes) specials += fmt::format("{} infinity codes; ", p.infinity_codes);
  else specials += "no infinities; ";
  specials += fmt::format("{} NaN codes; {} unused codes", p.nan_codes, p.unused_codes);
  if (auto nc = f.nan_code()) specials += fmt::format("; NaN input encodes to {}", code_hex(*nc, f.bits()));
  fmt::print("special codes     {}\n", specials);
  fmt::print("negative zero     {}\n", p.negative_zero ? code_hex(*p.negative_zero, f.bits()) : std::string("none"));

  const Overflow res = f.resolve(o);
  std::string beyond;
  if (res == Overflow::saturate) beyond = fmt::format("saturates to {}", number_text(p.max_finite));
  else if (f.has_infinity()) beyond = "gives infinity";
  else if (f.nan_code()) beyond = "gives NaN";
  else beyond = fmt::format("saturates to {} (the format has no special value)", number_text(p.max_finite));
  std::string where;
  auto vn = f.virtual_next_above_max();
  if (vn && (f.has_infinity() || f.nan_code())) {
    const Threshold th = midpoint(p.max_finite, vn->value);
    where = fmt::format("; nearest rounding overflows at |x| {} {}", vn->tie_goes_up ? ">=" : ">",
                        number_text(th.nearest));
    if (res == Overflow::saturate)
      where += fmt::format(" (under --overflow special it gives {})", f.has_infinity() ? "infinity" : "NaN");
  }
  fmt::print("overflow          policy {}: past max finite {}{}\n", to_string(res), beyond, where);

  if (!t || !codes) return;
  fmt::print("\n{:<{}}  {:<{}}  {:<9}  {:<24}  {}\n", "code", std::max((f.bits() + 3) / 4 + 2, 4), "bits",
             std::max<int>(f.bits() + 2, 4), "class", "value", "inputs that round here (nearest-even)");
  const Code n = Code{1} << f.bits();
  for (Code c = 0; c < n; ++c) {
    const CodeClass k = f.classify(c);
    const double v = f.decode(c);
    std::string value = (k == CodeClass::unused) ? "-" : number_text(v);
    std::string right;
    const Interval iv = interval_for(f, *t, c, o);
    if (iv.any) right = bound_text(iv.low, true) + ", " + bound_text(iv.high, false);
    else if (k == CodeClass::nan && f.nan_code() == c) right = "NaN inputs";
    else right = "-";
    const std::string desc = f.describe_code(c);
    if (!desc.empty() && k != CodeClass::infinity) right += "   " + desc;
    fmt::print("{:<{}}  {:<{}}  {:<9}  {:<24}  {}\n", code_hex(c, f.bits()), std::max((f.bits() + 3) / 4 + 2, 4),
               code_fields(f, c), std::max<int>(f.bits() + 2, 4), to_string(k), value, right);
  }
}

nlohmann::json to_json(const ElementFormat& f, const Preset* preset, const FormatProperties& p,
                       const ValueTable* t, Overflow o) {
  nlohmann::json j;
  j["format"] = f.spec();
  j["preset"] = preset ? nlohmann::json(preset->name) : nlohmann::json(nullptr);
  j["family"] = std::string(f.family());
  j["bits"] = f.bits();
  j["max"] = p.max_finite;
  j["lowest"] = p.lowest_finite;
  j["min_normal"] = p.min_normal ? nlohmann::json(*p.min_normal) : nlohmann::json(nullptr);
  j["min_subnormal"] = p.min_subnormal ? nlohmann::json(*p.min_subnormal) : nlohmann::json(nullptr);
  j["min_positive"] = p.min_positive;
  j["distinct_finite"] = p.distinct_finite;
  j["dynamic_range_binades"] = p.dynamic_range_binades;
  j["relative_spacing"] = {{"min", p.rel_spacing_min}, {"max", p.rel_spacing_max}};
  j["nan_codes"] = p.nan_codes;
  j["infinity_codes"] = p.infinity_codes;
  j["unused_codes"] = p.unused_codes;
  j["negative_zero_code"] = p.negative_zero ? nlohmann::json(*p.negative_zero) : nlohmann::json(nullptr);
  j["nan_input_code"] = f.nan_code() ? nlohmann::json(*f.nan_code()) : nlohmann::json(nullptr);
  j["overflow_policy"] = std::string(to_string(f.resolve(o)));
  if (auto vn = f.virtual_next_above_max()) {
    const Threshold th = midpoint(p.max_finite, vn->value);
    j["nearest_overflow_threshold"] = {{"value", th.nearest}, {"tie_overflows", vn->tie_goes_up}};
  } else {
    j["nearest_overflow_threshold"] = nullptr;
  }
  if (!t) {
    j["codes"] = nullptr;
    j["thresholds"] = nullptr;
    return j;
  }
  nlohmann::json codes = nlohmann::json::array();
  const Code n = Code{1} << f.bits();
  for (Code c = 0; c < n; ++c) {
    const CodeClass k = f.classify(c);
    nlohmann::json e = {{"code", c}, {"hex", code_hex(c, f.bits())}, {"class", std::string(to_string(k))}};
    e["value"] = k == CodeClass::unused ? nlohmann::json(nullptr) : json_value(f.decode(c));
    const Interval iv = interval_for(f, *t, c, o);
    if (iv.any) e["rounds_from"] = {{"low", bound_json(iv.low)}, {"high", bound_json(iv.high)}};
    const std::string d = f.describe_code(c);
    if (!d.empty()) e["meaning"] = d;
    codes.push_back(std::move(e));
  }
  j["codes"] = std::move(codes);
  nlohmann::json ths = nlohmann::json::array();
  const auto& vals = t->values();
  for (std::size_t i = 0; i < t->thresholds().size(); ++i) {
    const Threshold& th = t->thresholds()[i];
    nlohmann::json e = {{"value", th.nearest},
                        {"below_code", t->codes()[i]},
                        {"above_code", t->codes()[i + 1]},
                        {"tie_nearest_even_code", th.tie_to_upper ? t->codes()[i + 1] : t->codes()[i]},
                        {"tie_nearest_away_code", th.away_to_upper ? t->codes()[i + 1] : t->codes()[i]}};
    if (!th.exact_in_double()) e["exact"] = exact_midpoint_decimal(vals[i], vals[i + 1]);
    ths.push_back(std::move(e));
  }
  j["thresholds"] = std::move(ths);
  return j;
}

}  // namespace

void add_inspect_command(CLI::App& app) {
  auto* cmd = app.add_subcommand("inspect", "Properties, exact rounding thresholds and the full code table of a format");
  struct Opts {
    std::string spec;
    bool json = false;
    bool no_codes = false;
    std::string overflow = "default";
  };
  auto o = std::make_shared<Opts>();
  cmd->add_option("FORMAT", o->spec, "Format spec or preset name (see `lobit formats`)")->required();
  cmd->add_flag("--json", o->json, "Print one JSON object (codes and thresholds for formats up to 16 bits)");
  cmd->add_flag("--no-codes", o->no_codes, "Print the properties only");
  cmd->add_option("--overflow", o->overflow, "Overflow policy the table shows: default, saturate or special");
  cmd->callback([o] {
    auto ov = parse_overflow(o->overflow);
    if (!ov) throw usage_error(fmt::format("unknown overflow policy '{}'", o->overflow), "--overflow",
                               "use default, saturate or special");
    // A block-scaled format: its composition first, then its element.
    std::shared_ptr<const ScaledFormat> scaled;
    {
      const Preset* sp = find_preset(o->spec.substr(0, o->spec.find(',')));
      if (o->spec.find('@') != std::string::npos || o->spec.find(',') != std::string::npos || (sp && sp->scaled()))
        scaled = parse_scaled(o->spec);
    }
    auto f = scaled ? scaled->element : parse_element(o->spec);
    const Preset* preset = scaled ? nullptr : find_preset(o->spec);
    const FormatProperties p = properties(*f);
    nlohmann::json scaled_json;
    if (scaled) {
      const ScaledFormat& s = *scaled;
      std::string group = s.granularity == Granularity::block ? fmt::format("blocks of {}", s.block)
                                                              : std::string(to_string(s.granularity));
      scaled_json = {{"format", s.text},
                     {"element", s.element->spec()},
                     {"group", std::string(to_string(s.granularity))},
                     {"block", s.block},
                     {"scale", s.scale ? nlohmann::json(s.scale->spec()) : nlohmann::json(nullptr)},
                     {"rule", s.scale ? nlohmann::json(std::string(to_string(s.rule))) : nlohmann::json(nullptr)},
                     {"fixed_scale", s.fixed_scale},
                     {"tensor_scale", s.tensor_scale ? nlohmann::json(s.tensor_scale->spec()) : nlohmann::json(nullptr)},
                     {"zero_point", s.zero ? nlohmann::json(s.zero->spec()) : nlohmann::json(nullptr)},
                     {"scales_quantized_by", s.scales ? nlohmann::json(s.scales->text) : nlohmann::json(nullptr)},
                     {"sub_block", s.sub_block},
                     {"sub_bits", s.sub_bits},
                     {"element_max", s.element_max_value},
                     {"nominal_bits_per_element", s.nominal_bits_per_element()}};
      if (!o->json) {
        fmt::print("scaled format     {}\n", s.text);
        fmt::print("group             {}{}\n", group,
                   s.scale ? fmt::format(", scale stored as {} (rule {})", s.scale->spec(), to_string(s.rule))
                           : fmt::format(", fixed scale {}", number_text(s.fixed_scale)));
        if (s.tensor_scale) fmt::print("tensor scale      {} per tensor\n", s.tensor_scale->spec());
        if (s.zero) fmt::print("zero point        {} per group (x ~ s * (q - z), q unsigned)\n", s.zero->spec());
        if (s.scales) fmt::print("scales quantized  by {}\n", s.scales->text);
        if (s.sub_block) fmt::print("micro-exponents   {}-bit offset per {} elements\n", s.sub_bits, s.sub_block);
        fmt::print("bits per element  {} (full blocks; `lobit score` gives the figure for a shape)\n",
                   s.nominal_bits_per_element());
        fmt::print("element max       {} (the magnitude amax is mapped to)\n\n", number_text(s.element_max_value));
      }
    }
    std::unique_ptr<ValueTable> t;
    if (f->bits() <= 16) t = std::make_unique<ValueTable>(*f);
    if (o->json) {
      auto j = to_json(*f, preset, p, t.get(), *ov);
      if (scaled) j["scaled"] = scaled_json;
      if (o->no_codes) j.erase("codes"), j.erase("thresholds");
      print_json(j);
    } else {
      print_text(*f, preset, p, t.get(), *ov, !o->no_codes);
    }
  });
}

}  // namespace lobit::cli
