// `lobit design ...`: optimal quantizers for a density or for data, and the
// MSE-optimal scale of a format.
#include <cmath>
#include <fmt/format.h>

#include "common.hpp"
#include "lobit/design/lloyd_max.hpp"
#include "lobit/error.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/measure/exact_error.hpp"
#include "source_factory.hpp"

namespace lobit::cli {

namespace {

Density density_of(const std::string& name) {
  auto d = parse_density(name);
  if (!d) throw usage_error(fmt::format("unknown density '{}'", name), "--density", "use gauss, laplace or uniform");
  return *d;
}

std::string codebook_toml(const std::string& name, const std::string& summary, const std::string& source,
                          const std::vector<double>& levels) {
  std::string t = fmt::format("name = \"{}\"\nsummary = \"{}\"\nsource = \"{}\"\nvalues = [\n", name, summary, source);
  for (double v : levels) t += fmt::format("  {},\n", v);  // shortest text that reads back exactly
  t += "]\n";
  return t;
}

void print_levels(const LloydMaxResult& r, const std::string& title, bool json, double power) {
  if (json) {
    print_json({{"design", title}, {"levels", r.levels}, {"thresholds", r.thresholds}, {"mse", r.mse},
                {"signal_power", power}, {"iterations", r.iterations}, {"converged", r.converged}});
    return;
  }
  fmt::print("# {}\n", title);
  fmt::print("mse {}  (sqnr {:.4f} dB; signal power {}), {} iterations, {}\n", number_text(r.mse),
             10 * std::log10(power / r.mse), number_text(power), r.iterations, r.converged ? "converged" : "NOT converged");
  fmt::print("{:>5}  {:>24}  {:>24}\n", "index", "level", "threshold to the next");
  for (std::size_t i = 0; i < r.levels.size(); ++i)
    fmt::print("{:>5}  {:>24}  {:>24}\n", i, number_text(r.levels[i]),
               i + 1 < r.levels.size() ? number_text(r.thresholds[i]) : std::string("-"));
}

}  // namespace

void add_design_command(CLI::App& app) {
  auto* cmd = app.add_subcommand("design", "Design quantizers: Lloyd-Max levels, optimum uniform steps, optimal scales");
  cmd->require_subcommand(1);

  // lloyd-max
  {
    auto* sub = cmd->add_subcommand("lloyd-max", "Optimal N-level quantizer for a density (analytic) or for data");
    struct Opts {
      int levels = 16;
      std::string density, source, method = "lloyd", out, name;
      std::uint64_t samples = 1 << 16, seed = 0;
      bool json = false;
    };
    auto o = std::make_shared<Opts>();
    sub->add_option("--levels", o->levels, "Number of levels (default 16)");
    sub->add_option("--density", o->density, "gauss, laplace or uniform (unit variance): the analytic optimum");
    sub->add_option("--source", o->source, "Or a synthetic source to fit (see lobit score --help)");
    sub->add_option("--samples", o->samples, "Samples drawn from --source (default 65536)");
    sub->add_option("--seed", o->seed, "Seed of --source");
    sub->add_option("--method", o->method, "For data: lloyd (iterations) or exact (1-D k-means by dynamic programming)");
    sub->add_option("--out", o->out, "Write the levels as a codebook TOML file (use as codebook+file=PATH)");
    sub->add_option("--name", o->name, "Name recorded in the TOML file");
    sub->add_flag("--json", o->json, "Print JSON");
    sub->callback([o] {
      if (o->density.empty() == o->source.empty())
        throw usage_error("give exactly one of --density or --source", "design lloyd-max",
                          "e.g. --density gauss, or --source laplace --samples 100000");
      LloydMaxResult r;
      std::string title, provenance;
      double power = 1.0;
      if (!o->density.empty()) {
        const Density d = density_of(o->density);
        r = lloyd_max(d, o->levels);
        title = fmt::format("lloyd-max+levels={}+density={}", o->levels, to_string(d));
        provenance = fmt::format("Lloyd-Max optimum for the unit-variance {} density (lobit design lloyd-max)", to_string(d));
      } else {
        if (o->samples == 0) throw usage_error("--samples 0", "design lloyd-max", "give a positive count");
        const auto src = make_source(o->source, o->samples, o->seed, "");
        std::vector<float> buf(src->rows() * src->cols());
        src->fill_rows(0, src->rows(), buf.data());
        const std::vector<double> data(buf.begin(), buf.end());
        double p2 = 0;
        for (double v : data) p2 += v * v;
        power = p2 / static_cast<double>(data.size());
        if (o->method == "lloyd") r = lloyd_data(data, o->levels);
        else if (o->method == "exact") r = kmeans_1d_exact(data, o->levels);
        else throw usage_error(fmt::format("unknown method '{}'", o->method), "--method", "use lloyd or exact");
        title = fmt::format("{} {} levels on {} ({} samples, seed {})", o->method == "exact" ? "exact k-means" : "Lloyd",
                            o->levels, src->name(), data.size(), o->seed);
        provenance = title + " (lobit design lloyd-max)";
      }
      if (!o->out.empty()) {
        const std::string name = o->name.empty() ? std::string("lloyd-max-") + std::to_string(o->levels) : o->name;
        write_file_atomic(o->out, codebook_toml(name, title, provenance, r.levels));
      }
      print_levels(r, title, o->json, power);
      if (!o->out.empty() && !o->json) fmt::print("# written to {} (use codebook+file={})\n", o->out, o->out);
    });
  }

  // uniform
  {
    auto* sub = cmd->add_subcommand("uniform", "Optimum step of an N-level uniform quantizer for a density");
    auto levels = std::make_shared<int>(16);
    auto density = std::make_shared<std::string>("gauss");
    auto json = std::make_shared<bool>(false);
    sub->add_option("--levels", *levels, "Number of levels (default 16)");
    sub->add_option("--density", *density, "gauss (default), laplace or uniform");
    sub->add_flag("--json", *json, "Print JSON");
    sub->callback([levels, density, json] {
      const Density d = density_of(*density);
      const UniformOptimum u = optimal_uniform(d, *levels);
      if (*json) {
        print_json({{"density", std::string(to_string(d))}, {"levels", *levels}, {"step", u.step}, {"mse", u.mse},
                    {"values", u.levels}});
        return;
      }
      fmt::print("# optimum uniform quantizer, {} levels, unit-variance {}\n", *levels, to_string(d));
      fmt::print("step {}  mse {}  sqnr {:.4f} dB\n", number_text(u.step), number_text(u.mse), -10 * std::log10(u.mse));
    });
  }

  // scale
  {
    auto* sub = cmd->add_subcommand("scale", "MSE-optimal scale of a format for a density, with its exact error");
    auto spec = std::make_shared<std::string>();
    auto density = std::make_shared<std::string>("gauss");
    auto json = std::make_shared<bool>(false);
    sub->add_option("FORMAT", *spec, "Element format (up to 16 bits)")->required();
    sub->add_option("--density", *density, "gauss (default), laplace or uniform");
    sub->add_flag("--json", *json, "Print JSON");
    sub->callback([spec, density, json] {
      const Density d = density_of(*density);
      auto f = parse_element(*spec);
      const OptimalScale s = optimal_scale(*f, d);
      if (*json) {
        print_json({{"format", f->spec()}, {"density", std::string(to_string(d))}, {"scale", s.scale},
                    {"mse", s.error.mse}, {"sqnr_db", s.error.sqnr_db}, {"clip_probability", s.error.clip_probability},
                    {"zero_probability", s.error.zero_probability}});
        return;
      }
      fmt::print("# {} on the unit-variance {} density: x ~ scale * decode(encode(x / scale))\n",
                 format_title(*spec, *f), to_string(d));
      fmt::print("optimal scale     {}\n", number_text(s.scale));
      fmt::print("mse               {}\n", number_text(s.error.mse));
      fmt::print("sqnr              {:.4f} dB\n", s.error.sqnr_db);
      fmt::print("clip probability  {:.6g}\n", s.error.clip_probability);
      fmt::print("zero probability  {:.6g}\n", s.error.zero_probability);
    });
  }
}

}  // namespace lobit::cli
