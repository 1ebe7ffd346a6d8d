// `lobit fit PATH...`: what the values of checkpoint tensors look like before a format
// is chosen: moments, tails, the fitted families and their distances to the data,
// channel spreads and the largest outliers, per tensor (worst first) and in total.
#include <fmt/format.h>
#include <unistd.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <map>
#include <memory>

#include "checkpoint_args.hpp"
#include "common.hpp"
#include "lobit/error.hpp"
#include "lobit/io/tensor_view.hpp"
#include "lobit/measure/fit.hpp"
#include "lobit/source/random.hpp"
#include "lobit/version.hpp"

namespace lobit::cli {
namespace {

const char* kCaution =
    "the statistics describe the data given; choose formats by scoring them (lobit score) and validate accuracy "
    "on your own model and evaluation";

// Longest row the folded view is read in; longer rows are read as a column of single
// values (the channel layout still follows the folded matrix), so memory stays bounded.
// Columns as channels need per-column sums for every row in flight: a shorter limit.
constexpr std::uint64_t kMaxRowElements = std::uint64_t{1} << 20;
constexpr std::uint64_t kMaxRowElementsColumns = std::uint64_t{1} << 16;

struct TensorJob {
  const io::Checkpoint* ckpt = nullptr;
  std::size_t index = 0;
  io::AxisChoice choice;
  io::MatrixView view;
  std::unique_ptr<io::StoredTensorSource> source;
  TensorStats stats;
};

struct FileResult {
  std::string path, kind;
  std::size_t fitted = 0;
  std::vector<std::string> skipped;
  std::string error;
};

const io::TensorInfo& info(const TensorJob& j) { return j.ckpt->tensors()[j.index]; }

// Logical coordinates of a flat storage index.
std::vector<std::uint64_t> coords_of(const io::TensorInfo& t, std::uint64_t flat) {
  std::vector<std::uint64_t> c(t.shape.size(), 0);
  const std::size_t r = t.shape.size();
  for (std::size_t k = 0; k < r; ++k) {
    const std::size_t axis = t.fortran_order ? k : r - 1 - k;  // fastest first
    const std::uint64_t len = t.shape[axis];
    if (len == 0) break;
    c[axis] = flat % len;
    flat /= len;
  }
  return c;
}

std::string coords_text(const std::vector<std::uint64_t>& c) { return io::shape_text(c); }

nlohmann::json num(double v) { return json_value(v); }

std::string g(double v, int digits = 4) {
  if (std::isnan(v)) return "-";
  if (std::isinf(v)) return v > 0 ? "inf" : "-inf";
  return fmt::format("{:.{}g}", v, digits);
}

std::string pct(double fraction) {
  if (std::isnan(fraction)) return "-";
  return fmt::format("{:.3g}%", 100 * fraction);
}

std::string best_text(const TensorStats& s) {
  if (s.best_fit.empty()) return "-";
  if (s.best_fit == "student-t") {
    const DistributionFit* f = s.fit("student-t");
    return fmt::format("t nu={}", g(f->nu, 3));
  }
  return s.best_fit;
}

std::string ks_text(const TensorStats& s, const char* family) {
  const DistributionFit* f = s.fit(family);
  if (!f) return "-";
  return g(f->ks, 3) + (f->converged ? "" : "?");
}

std::string family_words(const std::string& f) {
  if (f == "gauss") return "Gaussian";
  if (f == "laplace") return "Laplace";
  return "Student-t";
}

// One plain-language line per tensor; the thresholds are rules of thumb, named in the
// text so the user can judge them.
std::string summary_line(const std::string& name, const TensorStats& s) {
  std::vector<std::string> parts;
  if (s.count == 0) return fmt::format("{}: no finite values", name);
  if (!(s.std > 0)) return fmt::format("{}: every value is {}", name, number_text(s.median));
  const double k = s.excess_kurtosis;
  std::string tails = k >= 3 ? "heavy-tailed" : k >= 0.5 ? "moderately heavy tails" : k <= -0.5 ? "light tails" : "near-Gaussian tails";
  std::string fit;
  if (!s.best_fit.empty()) {
    fit = ", best fit " + family_words(s.best_fit);
    if (s.best_fit == "student-t") fit += fmt::format(" nu={}", g(s.fit("student-t")->nu, 3));
  }
  parts.push_back(fmt::format("{} (excess kurtosis {}{})", tails, g(k, 3), fit));
  if (std::abs(s.skewness) >= 1) parts.push_back(fmt::format("skewed (skewness {})", g(s.skewness, 3)));
  if (s.crest >= 16)
    parts.push_back(fmt::format("crest factor {} (an absmax scale spends most of its range on outliers)", g(s.crest, 3)));
  if (s.channels > 1 && std::isfinite(s.channel_absmax_spread)) {
    if (s.channel_absmax_spread >= 4)
      parts.push_back(fmt::format("channel absmax varies {}x (per-tensor scaling will waste range)",
                                  g(s.channel_absmax_spread, 3)));
    else if (s.channel_absmax_spread >= 2)
      parts.push_back(fmt::format("channel absmax varies {}x", g(s.channel_absmax_spread, 3)));
  }
  if (s.zero_fraction >= 0.1) parts.push_back(fmt::format("{} exact zeros", pct(s.zero_fraction)));
  if (s.nonfinite()) parts.push_back(fmt::format("{} NaN/Inf values left out", s.nonfinite()));
  std::string line = name + ": " + parts[0];
  for (std::size_t i = 1; i < parts.size(); ++i) line += "; " + parts[i];
  return line;
}

nlohmann::json stats_json(const TensorStats& s) {
  nlohmann::json fits = nlohmann::json::array();
  for (const auto& f : s.fits)
    fits.push_back({{"family", f.family},
                    {"loc", num(f.loc)},
                    {"scale", num(f.scale)},
                    {"nu", f.family == "student-t" ? num(f.nu) : nlohmann::json(nullptr)},
                    {"ks", num(f.ks)},
                    {"ad", num(f.ad)},
                    {"log_likelihood", num(f.log_likelihood)},
                    {"bic", num(f.bic)},
                    {"converged", f.converged}});
  return {{"count", s.count},
          {"elements", s.elements},
          {"nonfinite", s.nonfinite()},
          {"nan", s.nan},
          {"infinite", s.infinite},
          {"mean", num(s.mean)},
          {"std", num(s.std)},
          {"skewness", num(s.skewness)},
          {"excess_kurtosis", num(s.excess_kurtosis)},
          {"absmax", num(s.absmax)},
          {"crest_factor", num(s.crest)},
          {"beyond_3sigma", num(s.beyond_3sigma)},
          {"beyond_6sigma", num(s.beyond_6sigma)},
          {"beyond_3sigma_count", s.beyond_3sigma_count},
          {"beyond_6sigma_count", s.beyond_6sigma_count},
          {"zeros", s.zeros},
          {"zero_fraction", num(s.zero_fraction)},
          {"median", num(s.median)},
          {"fits", fits},
          {"best_fit", s.best_fit.empty() ? nlohmann::json(nullptr) : nlohmann::json(s.best_fit)},
          {"channels", s.channels},
          {"channels_measured", s.channels_measured},
          {"channel_absmax_spread", num(s.channel_absmax_spread)},
          {"channel_std_spread", num(s.channel_std_spread)},
          {"subsample", {{"size", s.sample_size}, {"of", s.count}, {"subsampled", s.subsampled}}}};
}

}  // namespace

void add_fit_command(CLI::App& app) {
  auto* cmd = app.add_subcommand(
      "fit", "Distribution statistics of checkpoint tensors: moments, tails, fitted families, channel spread, outliers");
  struct Opts {
    std::vector<std::string> paths;
    TensorFilter filter;
    AxisOptions axes;
    int outliers = 10;
    std::uint64_t subsample = std::uint64_t{1} << 20;
    std::uint64_t seed = 1;
    int threads = 0;
    bool json = false, keep_going = false;
  };
  auto o = std::make_shared<Opts>();
  cmd->add_option("PATH", o->paths, "Checkpoint files (.safetensors or a sharded index .json, .npy, .npz, .onnx)")
      ->required();
  o->filter.add_options(*cmd);
  o->axes.add_options(*cmd);
  cmd->add_option("--outliers", o->outliers, "How many of the largest |x - mean| / std to list (default 10)")
      ->check(CLI::Range(0, 100000));
  cmd->add_option("--subsample", o->subsample,
                  "Values per tensor for the Student-t fit and the KS/AD distances (default 1048576; every value "
                  "when a tensor has fewer)");
  cmd->add_option("--seed", o->seed, "Seed of the subsample (default 1)");
  cmd->add_option("--threads", o->threads, "Worker threads (default: all cores); results do not depend on it");
  cmd->add_flag("--json", o->json, "Print one JSON object");
  cmd->add_flag("--keep-going", o->keep_going, "Report the other files when one fails (the exit status is still 2)");
  cmd->callback([o] {
    if (o->subsample < 16 || o->subsample > (std::uint64_t{1} << 22))
      throw usage_error(fmt::format("--subsample {}", o->subsample), "fit", "give 16 to 4194304");
    for (auto& r : o->axes.rules_text)
      if (r.find('=') == std::string::npos) r = "*=" + r;  // a bare axis applies to every tensor
    o->axes.resolve();
    FitOptions fo;
    fo.subsample = o->subsample;
    fo.seed = o->seed;
    fo.outliers = o->outliers;
    fo.threads = o->threads;
    const bool tty = isatty(2);

    std::vector<std::unique_ptr<io::Checkpoint>> ckpts;  // alive until the total's pass
    std::vector<TensorJob> jobs;
    std::vector<FileResult> files;
    std::vector<std::string> warnings;
    std::map<std::string, int> seen_names;
    FitTotal total(fo);
    std::uint64_t assumed = 0;
    for (const auto& path : o->paths) {
      FileResult fr;
      fr.path = path;
      std::vector<TensorJob> file_jobs;
      FitTotal file_total(fo);
      try {
        auto ckpt = io::open_checkpoint(path);
        fr.kind = std::string(ckpt->kind());
        for (std::size_t i = 0; i < ckpt->tensors().size(); ++i) {
          const io::TensorInfo& t = ckpt->tensors()[i];
          std::string why;
          if (!o->filter.selects(t, &why)) {
            fr.skipped.push_back(fmt::format("{} ({})", t.name, why));
            continue;
          }
          TensorJob j;
          j.ckpt = ckpt.get();
          j.index = i;
          j.choice = o->axes.choose(t);
          j.view = io::fold(t, j.choice.reduce);
          file_jobs.push_back(std::move(j));
        }
        if (file_jobs.empty())
          throw usage_error("no tensor selected", path,
                            fr.skipped.empty() ? "the file holds no tensors" : "loosen --tensor / --min-rank / --min-elements");
        for (std::size_t k = 0; k < file_jobs.size(); ++k) {
          TensorJob& j = file_jobs[k];
          const io::TensorInfo& t = info(j);
          if (tty) std::fprintf(stderr, "\rfitting %s: %zu of %zu tensors", path.c_str(), k + 1, file_jobs.size());
          io::MatrixView read_view = j.view;
          if (j.view.cols > (j.view.axis == 0 ? kMaxRowElementsColumns : kMaxRowElements)) {
            read_view.rows = t.count();
            read_view.cols = 1;
          }
          j.source = std::make_unique<io::StoredTensorSource>(*ckpt, j.index, read_view);
          const ChannelLayout layout{j.view.cols, j.view.axis};
          // The sample is keyed by the tensor name (a repeated name in another file gets its own stream).
          const int rep = seen_names[t.name]++;
          const std::uint64_t stream = name_stream(t.name) ^ (rep ? rng::mix64(static_cast<std::uint64_t>(rep)) : 0);
          SourceFit f = fit_source_with_summary(*j.source, fo, layout, stream);
          j.stats = f.stats;
          file_total.add(*j.source, std::move(f));
        }
        if (tty) std::fprintf(stderr, "\r%80s\r", "");
        fr.fitted = file_jobs.size();
        ckpts.push_back(std::move(ckpt));
      } catch (const Error& e) {
        if (tty) std::fprintf(stderr, "\r%80s\r", "");
        if (!o->keep_going || e.kind() != Error::Kind::usage) throw;
        fr.error = e.message();
        file_jobs.clear();
        files.push_back(std::move(fr));
        continue;
      }
      total.merge(std::move(file_total));
      for (auto& j : file_jobs) {
        const io::TensorInfo& t = info(j);
        if (j.choice.assumed) ++assumed;
        if (t.dtype == io::DType::f64)
          warnings.push_back(fmt::format("{}: tensor \"{}\" is f64; its statistics are of its values rounded to "
                                         "float32",
                                         path, t.name));
        if (!j.view.exact)
          warnings.push_back(fmt::format("{}: tensor \"{}\": the reduction axes ({}) are not contiguous in storage; "
                                         "channels taken along {} instead",
                                         path, t.name, j.choice.reason, j.view.text));
        if (j.stats.nonfinite())
          warnings.push_back(fmt::format("{}: tensor \"{}\": {} NaN and {} infinite values, left out of every "
                                         "statistic",
                                         path, t.name, j.stats.nan, j.stats.infinite));
        if (!j.stats.channels_measured && j.stats.channels > 1)
          warnings.push_back(fmt::format("{}: tensor \"{}\": {} channels, more than {}: channel spreads not measured",
                                         path, t.name, j.stats.channels, fo.max_channels));
        const DistributionFit* tf = j.stats.fit("student-t");
        if (tf && !tf->converged)
          warnings.push_back(fmt::format("{}: tensor \"{}\": the Student-t fit did not settle (many equal values?); "
                                         "it is left out of the best fit",
                                         path, t.name));
        jobs.push_back(std::move(j));
      }
      files.push_back(std::move(fr));
    }
    if (assumed)
      warnings.push_back(fmt::format("{} tensor(s) had no reduction axis in the file; the default by rank was assumed "
                                     "(channels are the rows of [out, in]; set --axis GLOB=AXES)",
                                     assumed));
    std::size_t failed = 0;
    for (const auto& f : files) failed += !f.error.empty();

    TensorStats tot;
    if (!jobs.empty()) {
      if (tty && total.sources() > 1) std::fprintf(stderr, "\rfitting the total: one more pass over %zu tensors",
                                                   static_cast<std::size_t>(total.sources()));
      tot = total.finish("total");
      if (tty) std::fprintf(stderr, "\r%80s\r", "");
    }
    // Worst first: the highest crest factor (absmax / std), the range an absmax scale must
    // cover. Constant tensors (std 0, crest infinite) and empty ones go last: one value is
    // no challenge to any format.
    std::vector<std::size_t> order(jobs.size());
    for (std::size_t i = 0; i < order.size(); ++i) order[i] = i;
    auto crest_key = [&](std::size_t i) {
      const double c = jobs[i].stats.crest;
      return std::isfinite(c) ? c : -INFINITY;
    };
    std::stable_sort(order.begin(), order.end(), [&](std::size_t a, std::size_t b) { return crest_key(a) > crest_key(b); });

    for (const auto& w : warnings) std::fprintf(stderr, "lobit: warning: %s\n", w.c_str());

    // The total's sources are in `jobs` order.
    auto total_outliers_json = [&](const TensorStats& s) {
      nlohmann::json arr = nlohmann::json::array();
      for (const auto& x : s.outliers) {
        const io::TensorInfo& t = info(jobs[x.source]);
        arr.push_back({{"tensor", t.name}, {"file", t.file}, {"index", x.index}, {"coords", coords_of(t, x.index)},
                       {"value", num(x.value)}, {"sigmas", num(x.sigmas)}});
      }
      return arr;
    };

    if (o->json) {
      nlohmann::json jf = nlohmann::json::array(), jt = nlohmann::json::array();
      for (const auto& f : files)
        jf.push_back({{"path", f.path},
                      {"kind", f.kind},
                      {"tensors_fitted", f.fitted},
                      {"tensors_skipped", f.skipped.size()},
                      {"skipped", f.skipped},
                      {"error", f.error.empty() ? nlohmann::json(nullptr) : nlohmann::json(f.error)}});
      for (std::size_t i : order) {
        const TensorJob& j = jobs[i];
        const io::TensorInfo& t = info(j);
        nlohmann::json e = {{"name", t.name},
                            {"file", t.file},
                            {"dtype", std::string(io::dtype_name(t.dtype))},
                            {"shape", t.shape},
                            {"reduced_over", j.view.text},
                            {"axis_reason", j.choice.reason},
                            {"axis_assumed", j.choice.assumed},
                            {"channel_axis", j.view.axis == 1 ? "rows" : "columns"}};
        e.update(stats_json(j.stats));
        nlohmann::json outs = nlohmann::json::array();
        for (const auto& x : j.stats.outliers)
          outs.push_back({{"index", x.index}, {"coords", coords_of(t, x.index)}, {"value", num(x.value)},
                          {"sigmas", num(x.sigmas)}});
        e["outliers"] = outs;
        e["summary"] = summary_line(t.name, j.stats);
        jt.push_back(std::move(e));
      }
      nlohmann::json jtotal = nullptr;
      if (!jobs.empty()) {
        jtotal = stats_json(tot);
        jtotal["tensors"] = tot.sources;
        jtotal["outliers"] = total_outliers_json(tot);
      }
      print_json({{"files", jf},
                  {"tensors", jt},
                  {"total", jtotal},
                  {"subsample_seed", o->seed},
                  {"failed_files", failed},
                  {"warnings", warnings},
                  {"caution", kCaution}});
    } else {
      for (const auto& f : files) {
        if (!f.error.empty())
          fmt::print("# FAILED: {}\n", f.error);
        else
          fmt::print("# {} ({}): {} tensor{} fitted{}\n", f.path, f.kind, f.fitted, f.fitted == 1 ? "" : "s",
                     f.skipped.empty() ? "" : fmt::format(", {} skipped", f.skipped.size()));
      }
      if (!jobs.empty()) {
        fmt::print("# worst first: highest crest factor (absmax / std). Population moments over the finite values; "
                   "median exact; >3std, >6std: share of |x - mean| beyond 3 and 6 std\n");
        fmt::print("# fits by maximum likelihood; KS distances on a seeded sample of up to {} values per tensor (seed "
                   "{}); best fit by BIC on that sample; ch.spread: max / median of per-channel absmax\n",
                   o->subsample, o->seed);
        std::size_t wn = 6, ws = 5;
        for (const auto& j : jobs) {
          wn = std::max(wn, info(j).name.size());
          ws = std::max(ws, info(j).shape_text().size());
        }
        const std::string fmt_row = "{:<{}}  {:<{}}  {:>11}  {:>10}  {:>10}  {:>7}  {:>8}  {:>7}  {:>7}  {:>8}  {:>7}  "
                                    "{:<11}  {:>8}  {:>8}  {:>8}  {:>9}\n";
        auto row = [&](const std::string& name, const std::string& shape, const TensorStats& s) {
          fmt::print(fmt::runtime(fmt_row), name, wn, shape, ws, s.count, g(s.mean), g(s.std), g(s.skewness, 3),
                     g(s.excess_kurtosis, 3), g(s.crest, 3), pct(s.beyond_3sigma), pct(s.beyond_6sigma),
                     pct(s.zero_fraction), best_text(s), ks_text(s, "gauss"), ks_text(s, "laplace"),
                     ks_text(s, "student-t"), s.channels > 1 && !std::isnan(s.channel_absmax_spread) ? g(s.channel_absmax_spread, 3) + "x" : "-");
        };
        fmt::print(fmt::runtime(fmt_row), "tensor", wn, "shape", ws, "count", "mean", "std", "skew", "ex.kurt",
                   "crest", ">3std", ">6std", "zeros", "best fit", "KS gauss", "KS lapl", "KS t", "ch.spread");
        for (std::size_t i : order) row(info(jobs[i]).name, info(jobs[i]).shape_text(), jobs[i].stats);
        row(fmt::format("(total, {} tensor{})", tot.sources, tot.sources == 1 ? "" : "s"), "", tot);
        fmt::print("\n");
        for (std::size_t i : order) fmt::print("{}\n", summary_line(info(jobs[i]).name, jobs[i].stats));
        if (!tot.outliers.empty()) {
          fmt::print("\n# largest |x - mean| / std over all tensors (mean {}, std {} of the total)\n", g(tot.mean, 6),
                     g(tot.std, 6));
          for (const auto& x : tot.outliers) {
            const io::TensorInfo& t = info(jobs[x.source]);
            fmt::print("{}{}  value {}  {:+.2f} std\n", t.name, coords_text(coords_of(t, x.index)), number_text(x.value),
                       x.sigmas);
          }
        }
        fmt::print("\n");
      }
      if (failed) fmt::print("# {} of {} files failed\n", failed, files.size());
      fmt::print("# lobit {} (git {}); threads do not change any figure\n", version(), git_revision());
      fmt::print("# {}\n", kCaution);
    }
    if (failed)
      throw usage_error(fmt::format("{} of {} files failed (reported above)", failed, files.size()), "fit");
  });
}

}  // namespace lobit::cli
