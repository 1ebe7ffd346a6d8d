// `lobit score FORMAT... --source SOURCE`: error per bit spent, scales included.
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <fmt/format.h>
#include <unistd.h>

#include "common.hpp"
#include "report_text.hpp"
#include "lobit/error.hpp"
#include "lobit/measure/exact_error.hpp"
#include "lobit/measure/score.hpp"
#include "lobit/version.hpp"
#include "score_files.hpp"
#include "source_factory.hpp"

namespace lobit::cli {

namespace {

struct Row {
  ScoreRow s;
  std::string name;  // as the user wrote it
  std::optional<double> mse_exact, sqnr_exact;
};

nlohmann::json opt(const std::optional<double>& v) { return v ? nlohmann::json(*v) : nlohmann::json(nullptr); }

std::string pct(double r) { return fmt::format("{:.4g}", 100 * r); }

const char* caution =
    "Error figures are estimates on the data given; validate accuracy on your own model and evaluation before "
    "choosing a format for hardware or deployment.";

}  // namespace

void add_score_command(CLI::App& app) {
  auto* cmd = app.add_subcommand("score", "Error of formats on a source, per bit spent (scales included)");
  struct Opts {
    std::vector<std::string> specs;
    std::vector<std::string> sources;
    std::uint64_t samples = 1 << 20;
    std::uint64_t seed = 0;
    std::string shape;
    std::vector<std::string> axis_text;
    int axis = 1;
    int threads = 0;
    std::uint64_t subsample = 0;
    bool keep_going = false;
    TensorFilter filter;
    bool exact = false, json = false, csv = false, md = false;
  };
  auto o = std::make_shared<Opts>();
  cmd->add_option("FORMAT", o->specs, "Formats: ELEMENT or ELEMENT@BLOCK:SCALE[,options]")->required();
  cmd->add_option("--source", o->sources,
                  "A synthetic source (gauss, laplace, uniform, logistic, student-t+nu=N, outliers, channel-scaled, "
                  "llm) or checkpoint files (.safetensors or a sharded index .json, .npy, .npz, .onnx; repeatable)")
      ->required();
  cmd->add_option("--samples", o->samples, "Number of samples for the scalar distributions (default 1048576)");
  cmd->add_option("--seed", o->seed, "Seed of the source (default 0)");
  cmd->add_option("--shape", o->shape, "ROWSxCOLS of the source (default: 1024 columns, or the source's own)");
  cmd->add_option("--axis", o->axis_text,
                  "Reduction axis. Synthetic sources: 1 (blocks along rows, default) or 0 (down columns). Files: "
                  "GLOB=AXES rules, first match wins (e.g. 'fc*=1', 'conv*=1-3', '*=last'); a bare number N is '*=N'. "
                  "Without a rule the file's graph (ONNX) or the default by rank decides")
      ->type_name("AXIS|GLOB=AXES");
  o->filter.add_options(*cmd);
  cmd->add_option("--subsample", o->subsample,
                  "Files: score about N elements per tensor (whole rows or columns, seeded by --seed) for a quick look");
  cmd->add_flag("--keep-going", o->keep_going, "Files: report the other files when one fails (the exit status is still 2)");
  cmd->add_option("--threads", o->threads, "Worker threads (default: all cores); results do not depend on it");
  cmd->add_flag("--exact", o->exact, "Add the closed-form MSE where it applies (bare formats on gauss/laplace/uniform)");
  cmd->add_flag("--json", o->json, "Print a JSON array, one object per format");
  cmd->add_flag("--csv", o->csv, "Print CSV");
  cmd->add_flag("--md", o->md, "Print a Markdown table for a design doc");
  cmd->callback([o] {
    if (o->json + o->csv + o->md > 1) throw usage_error("choose one of --json, --csv, --md", "score");
    std::size_t nfiles = 0;
    for (const auto& s : o->sources) nfiles += is_file_source(s);
    if (nfiles > 0) {
      if (nfiles != o->sources.size())
        throw usage_error("--source mixes files and synthetic sources", "score", "score them in separate runs");
      if (!o->shape.empty()) throw usage_error("--shape applies to synthetic sources only", "score");
      FileScoreArgs fa;
      fa.specs = o->specs;
      fa.paths = o->sources;
      fa.filter = o->filter;
      for (const auto& t : o->axis_text)
        fa.axis_rules.push_back(io::parse_axis_rule(t.find('=') == std::string::npos ? "*=" + t : t));
      fa.threads = o->threads;
      fa.subsample = o->subsample;
      fa.seed = o->seed;
      fa.keep_going = o->keep_going;
      fa.json = o->json, fa.csv = o->csv, fa.md = o->md;
      if (o->exact) throw usage_error("--exact applies to synthetic sources only", "score");
      score_files(fa);
      return;
    }
    if (o->sources.size() != 1)
      throw usage_error("give one synthetic --source", "score", "score several distributions in separate runs");
    if (!o->filter.include.empty() || !o->filter.exclude.empty() || o->filter.min_rank || o->filter.min_elements ||
        o->subsample || o->keep_going)
      throw usage_error("--tensor, --skip-tensor, --min-rank, --min-elements, --subsample and --keep-going apply to "
                        "checkpoint files only",
                        "score");
    if (o->axis_text.size() > 1) throw usage_error("give one --axis for a synthetic source", "score", "use 0 or 1");
    if (!o->axis_text.empty()) {
      if (o->axis_text[0] == "0") o->axis = 0;
      else if (o->axis_text[0] == "1") o->axis = 1;
      else throw usage_error(fmt::format("--axis {}", o->axis_text[0]), "score", "use 0 or 1 for a synthetic source");
    }
    if (o->samples == 0) throw usage_error("--samples 0", "score", "give a positive sample count");
    std::vector<std::shared_ptr<const ScaledFormat>> fs;
    for (const auto& s : o->specs) fs.push_back(parse_scaled(s));
    const auto src = make_source(o->sources[0], o->samples, o->seed, o->shape);
    ScoreOptions so;
    so.threads = o->threads;
    so.axis = o->axis;
    const bool show = isatty(2) && src->rows() * src->cols() >= (std::uint64_t{1} << 24);
    if (show)
      so.progress = [](std::uint64_t d, std::uint64_t n) {
        std::fprintf(stderr, "\rscoring: %3d%% (%llu of %llu chunks)", static_cast<int>(100 * d / n),
                     static_cast<unsigned long long>(d), static_cast<unsigned long long>(n));
      };
    const ScoreResult res = score(fs, *src, so);
    if (show) std::fprintf(stderr, "\r%60s\r", "");

    std::vector<Row> rows;
    const auto density = src->density();
    for (std::size_t i = 0; i < fs.size(); ++i) {
      Row r{res.rows[i], o->specs[i], std::nullopt, std::nullopt};
      const ScaledFormat& f = *fs[i];
      if (o->exact && density && f.granularity == Granularity::fixed && f.element->bits() <= 16) {
        const ExactError e = exact_mse(*f.element, *parse_density(*density), f.fixed_scale);
        r.mse_exact = e.mse;
        r.sqnr_exact = e.sqnr_db;
      }
      rows.push_back(std::move(r));
    }
    std::stable_sort(rows.begin(), rows.end(), [](const Row& a, const Row& b) {
      if (a.s.bits_per_element != b.s.bits_per_element) return a.s.bits_per_element < b.s.bits_per_element;
      return a.s.report.sqnr_db.value_or(INFINITY) > b.s.report.sqnr_db.value_or(INFINITY);
    });

    const std::string shape = fmt::format("{} x {}", src->rows(), src->cols());
    if (o->json) {
      nlohmann::json arr = nlohmann::json::array();
      for (const auto& r : rows) {
        const ErrorReport& e = r.s.report;
        nlohmann::json j = {{"format", r.s.format},
                            {"name", r.name},
                            {"source", src->name()},
                            {"shape", {src->rows(), src->cols()}},
                            {"axis", o->axis},
                            {"seed", o->seed},
                            {"bits_per_element", r.s.bits_per_element},
                            {"scale_bit_share", r.s.scale_bit_share},
                            {"ragged_last_block", r.s.ragged},
                            {"mse_exact", opt(r.mse_exact)},
                            {"sqnr_exact_db", opt(r.sqnr_exact)}};
        j.update(report_json(e, r.s.top_threshold));
        arr.push_back(std::move(j));
      }
      print_json(arr);
      return;
    }
    if (o->csv) {
      fmt::print("format,source,rows,cols,axis,seed,bits_per_element,mse,mse_stderr,sqnr_db,sqnr_low,sqnr_high,"
                 "max_abs_err,clip_rate,zero_rate,codes_used,entropy_bits,scale_bit_share,mse_exact\n");
      auto num = [](const std::optional<double>& v) { return v ? fmt::format("{}", *v) : std::string(); };
      for (const auto& r : rows) {
        const ErrorReport& e = r.s.report;
        fmt::print("\"{}\",\"{}\",{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{}\n", r.s.format, src->name(),
                   src->rows(), src->cols(), o->axis, o->seed, r.s.bits_per_element, e.mse, e.mse_stderr,
                   num(e.sqnr_db), num(e.sqnr_low), num(e.sqnr_high), e.max_abs_err, e.clip_rate, e.zero_rate,
                   e.codes_used, e.entropy_bits, r.s.scale_bit_share, num(r.mse_exact));
      }
      return;
    }
    if (o->md) {
      fmt::print("Source `{}`, {} samples ({}), seed {}, reduction axis {}.\n\n", src->name(), res.elements, shape,
                 o->seed, o->axis);
      fmt::print("| format | bits/element | MSE | SQNR dB [95%] | max error | clip % | zero % | codes used | entropy bits |{}\n",
                 o->exact ? " exact MSE |" : "");
      fmt::print("|---|---:|---:|---:|---:|---:|---:|---:|---:|{}\n", o->exact ? "---:|" : "");
      for (const auto& r : rows) {
        const ErrorReport& e = r.s.report;
        fmt::print("| `{}` | {} | {:.6g} | {} | {:.6g} | {} | {} | {} | {:.3f} |{}\n", r.s.format, r.s.bits_per_element,
                   e.mse, sqnr_text(e), e.max_abs_err, pct(e.clip_rate), pct(e.zero_rate), e.codes_used,
                   e.entropy_bits, o->exact ? fmt::format(" {} |", r.mse_exact ? fmt::format("{:.6g}", *r.mse_exact) : "-") : "");
      }
      fmt::print("\n{}\n", caution);
      return;
    }
    fmt::print("# source {} ({}), {} samples, seed {}\n", src->name(), shape, res.elements, o->seed);
    fmt::print("# elements rounded nearest-even and saturating; scale rule as each spec says (default: mx for "
               "power-of-two scales, absmax otherwise)\n");
    fmt::print("# reduction axis {} ({}); a short last block is scored as it is (noted per format); 95% intervals "
               "over groups\n",
               o->axis, o->axis == 1 ? "blocks run along rows" : "blocks run down columns");
    std::size_t w = 6;
    for (const auto& r : rows) w = std::max(w, r.name.size());
    fmt::print("{:<{}}  {:>9}  {:>11}  {:<27}  {:>10}  {:>7}  {:>7}  {:>6}  {:>7}{}\n", "format", w, "bits/elem", "MSE",
               "SQNR dB [95%]", "max err", "clip %", "zero %", "codes", "entropy", o->exact ? "    exact MSE" : "");
    for (const auto& r : rows) {
      const ErrorReport& e = r.s.report;
      fmt::print("{:<{}}  {:>9.6g}  {:>11.5g}  {:<27}  {:>10.4g}  {:>7}  {:>7}  {:>6}  {:>7.3f}{}\n", r.name, w,
                 r.s.bits_per_element, e.mse, sqnr_text(e), e.max_abs_err, pct(e.clip_rate), pct(e.zero_rate),
                 e.codes_used, e.entropy_bits,
                 o->exact ? fmt::format("  {:>11}", r.mse_exact ? fmt::format("{:.5g}", *r.mse_exact) : "-") : "");
      if (r.s.ragged)
        fmt::print("{:<{}}  note: the last block along axis {} is shorter than the block size (scored as it is)\n", "", w,
                   o->axis);
      if (e.saturated_groups || e.underflow_groups || e.nan_groups || e.nonfinite)
        fmt::print("{:<{}}  note: {} of {} groups had a saturated scale, {} an underflowing scale, {} NaN; {} non-finite inputs left out\n",
                   "", w, e.saturated_groups, e.groups, e.underflow_groups, e.nan_groups, e.nonfinite);
    }
    fmt::print("# lobit {} (git {}); threads: {}; chunks: {}\n", version(), git_revision(), res.threads, res.chunks);
    fmt::print("# {}\n", caution);
  });
}

}  // namespace lobit::cli
