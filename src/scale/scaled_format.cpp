#include "lobit/scale/scaled_format.hpp"

#include <cmath>
#include <fmt/format.h>

#include "lobit/error.hpp"
#include "lobit/format/integer.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/format/value_table.hpp"

namespace lobit {

std::string_view to_string(Granularity g) {
  switch (g) {
    case Granularity::fixed: return "fixed";
    case Granularity::tensor: return "tensor";
    case Granularity::row: return "row";
    case Granularity::col: return "col";
    case Granularity::block: return "block";
  }
  return "?";
}

std::string_view to_string(ScaleRule r) {
  switch (r) {
    case ScaleRule::mx: return "mx";
    case ScaleRule::absmax: return "absmax";
    case ScaleRule::noclip: return "noclip";
    case ScaleRule::mse: return "mse";
  }
  return "?";
}

double element_max(const ElementFormat& e) {
  if (e.bits() <= 16) {
    const ValueTable t(e);
    // The largest magnitude reachable on both sides (int4: 7, not 8), so that
    // scaling by amax never clips either sign; unsigned formats: the top value.
    const double lo = t.values().front(), hi = t.values().back();
    return lo < 0 ? std::min(-lo, hi) : hi;
  }
  // Wide formats are floats: the largest magnitude is just below the top code.
  double m = 0;
  for (double x : {1e308, -1e308}) m = std::max(m, std::fabs(e.decode(e.encode(x, Rounding::nearest_even, Overflow::saturate))));
  return m;
}

int element_emax(const ElementFormat& e) { return std::ilogb(element_max(e)); }

namespace {

std::uint64_t ceil_div(std::uint64_t a, std::uint64_t b) { return (a + b - 1) / b; }

// Splits at top-level commas (none of the parts nest commas).
std::vector<std::string> split_commas(std::string_view s) {
  std::vector<std::string> out;
  std::size_t start = 0;
  for (;;) {
    const std::size_t c = s.find(',', start);
    out.emplace_back(s.substr(start, c == std::string_view::npos ? std::string_view::npos : c - start));
    if (c == std::string_view::npos) break;
    start = c + 1;
  }
  return out;
}

int parse_positive(std::string_view text, const std::string& what, const std::string& where) {
  int v = 0;
  if (text.empty() || text.size() > 9) v = -1;
  for (char c : text) {
    if (c < '0' || c > '9') {
      v = -1;
      break;
    }
    v = v * 10 + (c - '0');
  }
  if (v <= 0)
    throw usage_error(fmt::format("{} '{}' is not a positive whole number", what, text), where,
                      "write e.g. @32 for blocks of 32 elements");
  return v;
}

}  // namespace

std::shared_ptr<const ScaledFormat> parse_scaled(std::string_view spec) {
  const std::string where = fmt::format("format '{}'", spec);
  {
    // A block-scaled preset, optionally with more options after a comma.
    const std::size_t c = spec.find(',');
    const std::string name(spec.substr(0, c));
    if (const Preset* p = find_preset(name); p && p->scaled()) {
      std::string expanded = p->spec;
      if (c != std::string_view::npos) expanded += std::string(spec.substr(c));
      auto f = parse_scaled(expanded);
      return f;
    }
  }
  auto out = std::make_shared<ScaledFormat>();
  // Options come after the first top-level comma; the nested `scales=` value may
  // itself hold '@' and ':', so split the head off first.
  const std::size_t comma = spec.find(',');
  const std::string_view head = spec.substr(0, comma);
  std::vector<std::string> opts;
  if (comma != std::string_view::npos) opts = split_commas(spec.substr(comma + 1));

  const std::size_t at = head.find('@');
  out->element = parse_element(head.substr(0, at));
  if (at != std::string_view::npos) {
    const std::string_view group_scale = head.substr(at + 1);
    const std::size_t colon = group_scale.find(':');
    const std::string_view group = group_scale.substr(0, colon);
    if (group == "tensor") out->granularity = Granularity::tensor;
    else if (group == "row") out->granularity = Granularity::row;
    else if (group == "col") out->granularity = Granularity::col;
    else {
      out->granularity = Granularity::block;
      out->block = parse_positive(group, "block size", where);
      if (out->block < 2)
        throw usage_error("a block needs at least 2 elements", where, "write @k with k >= 2, or @tensor / @row / @col");
    }
    const std::string_view scale_text = colon == std::string_view::npos ? std::string_view("fp32") : group_scale.substr(colon + 1);
    if (scale_text.empty()) throw usage_error("empty scale format after ':'", where, "write e.g. :e8m0 or :fp16");
    out->scale = parse_element(scale_text);
    out->rule = out->scale->family() == "pow2" ? ScaleRule::mx : ScaleRule::absmax;
  }

  bool rule_given = false;
  for (const auto& o : opts) {
    const std::size_t eq = o.find('=');
    if (eq == std::string::npos || eq == 0 || eq + 1 == o.size())
      throw usage_error(fmt::format("option '{}' is not key=value", o), where, "write ,rule=mx or ,zero=uint4");
    const std::string key = o.substr(0, eq), val = o.substr(eq + 1);
    if (key == "rule") {
      if (val == "mx") out->rule = ScaleRule::mx;
      else if (val == "absmax") out->rule = ScaleRule::absmax;
      else if (val == "noclip") out->rule = ScaleRule::noclip;
      else if (val == "mse") out->rule = ScaleRule::mse;
      else throw usage_error(fmt::format("rule={} is not a scale rule", val), where, "use rule=mx, absmax, noclip or mse");
      rule_given = true;
    } else if (key == "tensor-scale") {
      out->tensor_scale = parse_element(val);
    } else if (key == "zero") {
      out->zero = parse_element(val);
    } else if (key == "scales") {
      out->scales = parse_scaled(val);
      if (out->scales->granularity != Granularity::block)
        throw usage_error("scales= needs a block-scaled format", where, "write e.g. scales=e4m3@256:fp32");
    } else if (key == "sub") {
      const std::size_t c = val.find(':');
      if (c == std::string::npos) throw usage_error("sub= needs K2:D2", where, "write e.g. sub=2:1");
      out->sub_block = parse_positive(val.substr(0, c), "sub-block size", where);
      out->sub_bits = parse_positive(val.substr(c + 1), "sub-block offset bits", where);
    } else if (key == "scale") {
      char* end = nullptr;
      out->fixed_scale = std::strtod(val.c_str(), &end);
      if (end != val.c_str() + val.size() || !(out->fixed_scale > 0) || !std::isfinite(out->fixed_scale))
        throw usage_error(fmt::format("scale={} is not a positive number", val), where, "write e.g. ,scale=0.25");
    } else if (key == "ragged") {
      if (val == "allow") out->allow_ragged = true;
      else if (val == "refuse") out->allow_ragged = false;
      else throw usage_error(fmt::format("ragged={} is not a policy", val), where, "use ragged=allow or ragged=refuse");
    } else {
      throw usage_error(fmt::format("unknown option '{}'", key), where,
                        "options: rule, tensor-scale, zero, scales, sub, scale, ragged");
    }
  }

  // Consistency.
  if (out->granularity == Granularity::fixed) {
    if (out->tensor_scale || out->zero || out->scales || out->sub_block || rule_given)
      throw usage_error("scale options need a group (@k, @row, @col or @tensor)", where, "write e.g. int4@32:fp16,zero=uint4");
  } else if (out->fixed_scale != 1.0) {
    throw usage_error("scale= is for a bare element format", where, "drop scale= or the @ group");
  }
  if (out->rule == ScaleRule::mx && out->scale && out->scale->family() != "pow2")
    throw usage_error("rule=mx needs a power-of-two scale format", where, "use :e8m0, or rule=absmax");
  if (out->sub_block) {
    if (out->granularity != Granularity::block || out->rule != ScaleRule::mx)
      throw usage_error("sub= needs blocks with a power-of-two scale (rule=mx)", where, "write e.g. int+bits=8+range=symmetric+frac=6@16:e8m0,sub=2:1");
    if (out->sub_block >= out->block || out->block % out->sub_block != 0)
      throw usage_error(fmt::format("sub-block size {} must divide the block size {} and be smaller", out->sub_block, out->block), where);
    if (out->sub_bits > 8) throw usage_error("sub-block offsets of more than 8 bits", where, "use 1 to 8 bits");
  }
  if (out->zero) {
    if (out->element->family() != "int")
      throw usage_error("a zero point needs an integer element", where, "write e.g. uint4@128:fp16,zero=uint4");
    if (dynamic_cast<const Integer*>(out->element.get()) == nullptr)
      throw usage_error("a zero point needs an integer element", where);
    if (out->rule == ScaleRule::mx)
      throw usage_error("a zero point with rule=mx is not supported", where, "use a float scale format");
  }
  if (out->rule == ScaleRule::mse && (out->granularity == Granularity::tensor || out->granularity == Granularity::col))
    throw usage_error("rule=mse works on row and block groups", where, "use @row or @k with rule=mse");
  if (out->scales && out->granularity != Granularity::block)
    throw usage_error("scales= needs block scaling", where, "write e.g. nf4@64:fp32,scales=e4m3@256:fp32");
  if (out->element->bits() > 16 && out->granularity != Granularity::fixed)
    throw usage_error("block scaling of elements wider than 16 bits", where, "use an element of at most 16 bits");

  // Canonical text: the parts as written, the rule only where it is not the default.
  std::string t(head.substr(0, at));
  if (out->granularity != Granularity::fixed) {
    t += '@';
    t += out->granularity == Granularity::block ? std::to_string(out->block) : std::string(to_string(out->granularity));
    t += ':';
    const std::string_view gs = head.substr(at + 1);
    const std::size_t colon = gs.find(':');
    t += colon == std::string_view::npos ? std::string_view("fp32") : gs.substr(colon + 1);
    const ScaleRule def = out->scale->family() == "pow2" ? ScaleRule::mx : ScaleRule::absmax;
    if (out->rule != def) {
      t += ",rule=";
      t += to_string(out->rule);
    }
  }
  for (const auto& o : opts)
    if (o.rfind("rule=", 0) != 0) {
      t += ',';
      t += o;
    }
  out->text = t;

  if (out->zero) {
    IntegerParams up = dynamic_cast<const Integer&>(*out->element).params();
    up.sign = false;
    up.symmetric = false;
    out->code_element = std::make_shared<Integer>(up);
    out->element_max_value = std::ldexp(static_cast<double>((std::int64_t{1} << up.bits) - 1), -up.frac_bits);
  } else {
    out->code_element = out->element;
    out->element_max_value = element_max(*out->element);
  }
  if (out->code_element->bits() <= 16) {
    auto table = std::make_shared<NearestTable>(*out->code_element);
    if (table->usable()) out->element_table = table;
  }
  return out;
}

double ScaledFormat::bits_per_element(std::uint64_t rows, std::uint64_t cols, int axis) const {
  const double n = static_cast<double>(rows) * static_cast<double>(cols);
  double bits = element->bits();
  if (granularity == Granularity::fixed) return bits;
  const double per_group = static_cast<double>(scale->bits()) + (zero ? zero->bits() : 0);
  std::uint64_t groups = 1;
  std::uint64_t subs = 0;
  switch (granularity) {
    case Granularity::tensor: groups = 1; break;
    case Granularity::row: groups = rows; break;
    case Granularity::col: groups = cols; break;
    case Granularity::block: {
      const std::uint64_t along = axis == 1 ? cols : rows, across = axis == 1 ? rows : cols;
      groups = across * ceil_div(along, static_cast<std::uint64_t>(block));
      if (sub_block) {
        const std::uint64_t full = along / block, rest = along % block;
        subs = across * (full * (block / sub_block) + ceil_div(rest, static_cast<std::uint64_t>(sub_block)));
      }
      break;
    }
    default: break;
  }
  if (scales) {
    // The group scales form a 1 x groups vector quantized by the nested format.
    bits += (scales->bits_per_element(1, groups, 1) * static_cast<double>(groups) +
             (zero ? static_cast<double>(zero->bits() * groups) : 0.0)) / n;
  } else {
    bits += per_group * static_cast<double>(groups) / n;
  }
  bits += static_cast<double>(sub_bits) * static_cast<double>(subs) / n;
  if (tensor_scale) bits += tensor_scale->bits() / n;
  return bits;
}

double ScaledFormat::nominal_bits_per_element() const {
  double bits = element->bits();
  if (granularity != Granularity::block) return bits;
  const double per = scales ? scales->nominal_bits_per_element() : scale->bits();
  bits += (per + (zero ? zero->bits() : 0)) / block;
  if (sub_block) bits += static_cast<double>(sub_bits) / sub_block;
  return bits;
}

}  // namespace lobit
