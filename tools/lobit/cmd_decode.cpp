// `lobit decode FORMAT CODE...`: exact value of each code.
#include <fmt/format.h>

#include "common.hpp"
#include "lobit/error.hpp"
#include "lobit/format/spec.hpp"

namespace lobit::cli {

void add_decode_command(CLI::App& app) {
  auto* cmd = app.add_subcommand("decode", "Decode codes of a format to their exact values");
  struct Opts {
    std::string spec;
    std::vector<std::string> codes;
    bool json = false;
  };
  auto o = std::make_shared<Opts>();
  cmd->add_option("FORMAT", o->spec, "Format spec or preset name")->required();
  cmd->add_option("CODE", o->codes, "Codes in hex (0x7e), binary (0b0111) or decimal")->required();
  cmd->add_flag("--json", o->json, "Print a JSON array of {code, hex, value, class}");
  cmd->callback([o] {
    auto f = parse_element(o->spec);
    std::vector<Code> codes;
    for (std::size_t i = 0; i < o->codes.size(); ++i)
      codes.push_back(parse_code(o->codes[i], *f, fmt::format("code {} ('{}')", i + 1, o->codes[i])));
    if (o->json) {
      nlohmann::json arr = nlohmann::json::array();
      for (Code c : codes) {
        const CodeClass k = f->classify(c);
        nlohmann::json e = {{"code", c}, {"hex", code_hex(c, f->bits())}, {"class", std::string(to_string(k))}};
        e["value"] = k == CodeClass::unused ? nlohmann::json(nullptr) : json_value(f->decode(c));
        const std::string d = f->describe_code(c);
        if (!d.empty()) e["meaning"] = d;
        arr.push_back(std::move(e));
      }
      print_json(arr);
      return;
    }
    fmt::print("# {}\n", format_title(o->spec, *f));
    const int cw = std::max((f->bits() + 3) / 4 + 2, 4), bw = std::max(f->bits() + 2, 4);
    fmt::print("{:<{}}  {:<{}}  {:<9}  {:<24}  {}\n", "code", cw, "bits", bw, "class", "value", "exact");
    for (Code c : codes) {
      const CodeClass k = f->classify(c);
      const double v = f->decode(c);
      std::string exact = (k == CodeClass::unused || k == CodeClass::nan) ? f->describe_code(c) : hex_text(v);
      fmt::print("{:<{}}  {:<{}}  {:<9}  {:<24}  {}\n", code_hex(c, f->bits()), cw, code_fields(*f, c), bw,
                 to_string(k), k == CodeClass::unused ? std::string("-") : number_text(v), exact);
    }
  });
}

}  // namespace lobit::cli
