// `lobit encode FORMAT VALUE...`: nearest code under a rounding mode.
#include <cmath>
#include <fmt/format.h>

#include "common.hpp"
#include "lobit/error.hpp"
#include "lobit/format/bulk.hpp"
#include "lobit/format/spec.hpp"

namespace lobit::cli {

void add_encode_command(CLI::App& app) {
  auto* cmd = app.add_subcommand("encode", "Encode numbers into a format's codes");
  struct Opts {
    std::string spec;
    std::vector<std::string> values;
    std::string round = "nearest-even";
    std::string overflow = "default";
    std::string from = "number";
    std::uint64_t seed = 0;
    bool json = false;
  };
  auto o = std::make_shared<Opts>();
  cmd->add_option("FORMAT", o->spec, "Format spec or preset name")->required();
  cmd->add_option("VALUE", o->values, "Numbers (decimal, hex float, inf, nan) or, with --from, bit patterns")
      ->required();
  cmd->add_option("--round", o->round,
                  "Rounding: nearest-even (default), nearest-away, toward-zero, up, down, stochastic");
  cmd->add_option("--overflow", o->overflow,
                  "Past max finite: default (saturate without infinity, else IEEE), saturate, special");
  cmd->add_option("--from", o->from,
                  "Read VALUEs as: number (default), or fp32 / fp16 / bf16 bit patterns (0x3c00)");
  cmd->add_option("--seed", o->seed, "Seed of stochastic rounding (value i uses stochastic_word(seed, i))");
  cmd->add_flag("--json", o->json, "Print a JSON array of {input, code, hex, value, class}");
  cmd->allow_extras(false);
  cmd->positionals_at_end(false);
  cmd->callback([o] {
    auto r = parse_rounding(o->round);
    if (!r) throw usage_error(fmt::format("unknown rounding mode '{}'", o->round), "--round",
                              "use nearest-even, nearest-away, toward-zero, up, down or stochastic");
    auto ov = parse_overflow(o->overflow);
    if (!ov) throw usage_error(fmt::format("unknown overflow policy '{}'", o->overflow), "--overflow",
                               "use default, saturate or special");
    auto f = parse_element(o->spec);
    // Read every input before printing anything.
    std::vector<double> in;
    for (std::size_t i = 0; i < o->values.size(); ++i) {
      const std::string where = fmt::format("value {} ('{}')", i + 1, o->values[i]);
      double x;
      if (o->from == "number") {
        x = parse_number(o->values[i], where);
      } else if (o->from == "fp32" || o->from == "fp16" || o->from == "bf16") {
        const auto src = parse_element(o->from);
        const Code c = parse_code(o->values[i], *src, where);
        x = src->decode(c);
        if (std::isnan(x) && src->classify(c) != CodeClass::nan) throw usage_error("not a value", where);
      } else {
        throw usage_error(fmt::format("unknown input kind '{}'", o->from), "--from",
                          "use number, fp32, fp16 or bf16");
      }
      if (std::isnan(x) && !f->nan_code())
        throw usage_error("NaN input, and this format has no NaN code", where, "leave NaNs out");
      in.push_back(x);
    }
    std::vector<Code> codes(in.size());
    EncodeOptions eo{.rounding = *r, .overflow = *ov, .seed = o->seed};
    encode(*f, std::span<const double>(in), std::span<Code>(codes), eo);
    if (o->json) {
      nlohmann::json arr = nlohmann::json::array();
      for (std::size_t i = 0; i < in.size(); ++i)
        arr.push_back({{"input", json_value(in[i])}, {"code", codes[i]}, {"hex", code_hex(codes[i], f->bits())},
                       {"value", json_value(f->decode(codes[i]))},
                       {"class", std::string(to_string(f->classify(codes[i])))}});
      print_json(arr);
      return;
    }
    fmt::print("# {}  rounding {}  overflow {}\n", format_title(o->spec, *f), to_string(*r), to_string(f->resolve(*ov)));
    fmt::print("{:<24}  {:<{}}  {:<24}  {:<10}  {}\n", "input", "code", std::max((f->bits() + 3) / 4 + 2, 4), "value", "class",
               "value - input (binary64)");
    for (std::size_t i = 0; i < in.size(); ++i) {
      const double v = f->decode(codes[i]);
      const double err = (std::isfinite(v) && std::isfinite(in[i])) ? v - in[i] : NAN;
      fmt::print("{:<24}  {:<{}}  {:<24}  {:<10}  {}\n", number_text(in[i]), code_hex(codes[i], f->bits()),
                 std::max((f->bits() + 3) / 4 + 2, 4), number_text(v), to_string(f->classify(codes[i])),
                 std::isnan(err) ? std::string("-") : number_text(err));
    }
  });
}

}  // namespace lobit::cli
