// `lobit formats`: the presets, one line each.
#include <fmt/format.h>

#include "common.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/scale/scaled_format.hpp"

namespace lobit::cli {

void add_formats_command(CLI::App& app) {
  auto* cmd = app.add_subcommand("formats", "List the named presets with a one-line description");
  auto json = std::make_shared<bool>(false);
  cmd->add_flag("--json", *json, "Print a JSON array");
  cmd->callback([json] {
    if (*json) {
      nlohmann::json arr = nlohmann::json::array();
      for (const auto& p : presets()) {
        nlohmann::json e = {{"name", p.name}, {"aliases", p.aliases}, {"summary", p.summary}, {"source", p.source}};
        if (p.scaled()) {
          auto f = parse_scaled(p.name);
          e["kind"] = "scaled";
          e["bits"] = f->nominal_bits_per_element();
          e["format"] = f->text;
        } else {
          auto f = parse_element(p.name);
          e["kind"] = "element";
          e["bits"] = f->bits();
          e["format"] = f->spec();
        }
        arr.push_back(std::move(e));
      }
      print_json(arr);
      return;
    }
    // Element formats first, then block-scaled compositions; each list aligned on its own.
    for (const bool scaled : {false, true}) {
      std::size_t w = 0;
      for (const auto& p : presets())
        if (p.scaled() == scaled) w = std::max(w, p.name.size());
      fmt::print("{}\n", scaled ? "\nblock-scaled formats (bits per element, scales included)" : "element formats (bits)");
      for (const auto& p : presets()) {
        if (p.scaled() != scaled) continue;
        const double bits = scaled ? parse_scaled(p.name)->nominal_bits_per_element() : parse_element(p.name)->bits();
        std::string aka;
        if (!p.aliases.empty()) aka = fmt::format("  (also {})", fmt::join(p.aliases, ", "));
        fmt::print("  {:<{}}  {:>7}  {}{}\n", p.name, w, fmt::format("{}", bits), p.summary, aka);
      }
    }
  });
}

}  // namespace lobit::cli
