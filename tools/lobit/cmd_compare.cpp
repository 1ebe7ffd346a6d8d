// `lobit compare FORMAT...`: the properties of several formats side by side.
#include <cmath>
#include <fmt/format.h>

#include "common.hpp"
#include "lobit/error.hpp"
#include "lobit/format/properties.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/format/value_table.hpp"

namespace lobit::cli {

void add_compare_command(CLI::App& app) {
  auto* cmd = app.add_subcommand("compare", "Range, resolution and special codes of several formats side by side");
  struct Opts {
    std::vector<std::string> specs;
    bool json = false;
    bool values = false;
  };
  auto o = std::make_shared<Opts>();
  cmd->add_option("FORMAT", o->specs, "Format specs or preset names")->required();
  cmd->add_flag("--json", o->json, "Print a JSON array, one object per format");
  cmd->add_flag("--values", o->values, "Also list the non-negative values of formats up to 6 bits");
  cmd->callback([o] {
    std::vector<std::shared_ptr<const ElementFormat>> fs;
    std::vector<FormatProperties> ps;
    for (const auto& s : o->specs) {
      fs.push_back(parse_element(s));
      ps.push_back(properties(*fs.back()));
    }
    auto small_values = [](const ElementFormat& f) {
      std::vector<double> out;
      if (f.bits() > 6) return out;
      const ValueTable t(f);
      for (double v : t.values())
        if (v >= 0) out.push_back(v);
      return out;
    };
    if (o->json) {
      nlohmann::json arr = nlohmann::json::array();
      for (std::size_t i = 0; i < fs.size(); ++i) {
        const auto& p = ps[i];
        nlohmann::json e = {{"name", o->specs[i]},
                            {"format", fs[i]->spec()},
                            {"bits", p.bits},
                            {"max", p.max_finite},
                            {"lowest", p.lowest_finite},
                            {"min_positive", p.min_positive},
                            {"distinct_finite", p.distinct_finite},
                            {"dynamic_range_binades", p.dynamic_range_binades},
                            {"relative_spacing", {{"min", p.rel_spacing_min}, {"max", p.rel_spacing_max}}},
                            {"infinity_codes", p.infinity_codes},
                            {"nan_codes", p.nan_codes},
                            {"unused_codes", p.unused_codes}};
        if (o->values) {
          nlohmann::json vals = nlohmann::json::array();
          for (double v : small_values(*fs[i])) vals.push_back(v);
          e["non_negative_values"] = vals;
        }
        arr.push_back(std::move(e));
      }
      print_json(arr);
      return;
    }
    std::size_t w = 6;
    for (const auto& s : o->specs) w = std::max(w, s.size());
    fmt::print("{:<{}}  {:>4}  {:>12}  {:>12}  {:>8}  {:>8}  {:>17}  {}\n", "format", w, "bits", "max", "min pos",
               "distinct", "binades", "rel. spacing", "specials");
    for (std::size_t i = 0; i < fs.size(); ++i) {
      const auto& p = ps[i];
      std::string sp;
      if (p.infinity_codes) sp += "inf ";
      if (p.nan_codes) sp += fmt::format("{} NaN ", p.nan_codes);
      if (p.unused_codes) sp += fmt::format("{} unused ", p.unused_codes);
      if (p.negative_zero) sp += "-0";
      if (sp.empty()) sp = "none";
      fmt::print("{:<{}}  {:>4}  {:>12.6g}  {:>12.6g}  {:>8}  {:>8.4g}  {:>7.3g} .. {:<7.3g}  {}\n", o->specs[i], w,
                 p.bits, p.max_finite, p.min_positive, p.distinct_finite, p.dynamic_range_binades, p.rel_spacing_min,
                 p.rel_spacing_max, sp);
    }
    fmt::print("(figures to 6 significant digits; --json prints them exactly)\n");
    if (o->values) {
      fmt::print("\nnon-negative values (formats up to 6 bits)\n");
      for (std::size_t i = 0; i < fs.size(); ++i) {
        const auto v = small_values(*fs[i]);
        if (v.empty()) continue;
        std::vector<std::string> txt;
        for (double x : v) txt.push_back(fmt::format("{:.6g}", x));
        fmt::print("{:<{}}  {}\n", o->specs[i], w, fmt::join(txt, " "));
      }
    }
  });
}

}  // namespace lobit::cli
