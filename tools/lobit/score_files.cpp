// Scoring formats on checkpoint tensors: one row per tensor and format (worst SQNR
// first), a parameter-weighted total per file and format, warnings for assumed axes,
// non-finite values and skipped tensors.
#include "score_files.hpp"

#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fmt/format.h>
#include <map>
#include <mutex>
#include <thread>

#include "common.hpp"
#include "report_text.hpp"
#include "lobit/detail/parallel.hpp"
#include "lobit/error.hpp"
#include "lobit/io/tensor_view.hpp"
#include "lobit/measure/score.hpp"
#include "lobit/source/random.hpp"
#include "lobit/version.hpp"

namespace lobit::cli {
namespace {

const char* kCaution =
    "Error figures are estimates on the data given; validate accuracy on your own model and evaluation before "
    "choosing a format for hardware or deployment.";

// A seeded subset of whole rows (blocks along rows) or whole columns (blocks down
// columns), so every group is scored as a kernel would see it.
class SubsetSource final : public TensorSource {
 public:
  SubsetSource(const io::StoredTensorSource& base, std::uint64_t want, std::uint64_t seed)
      : base_(base), axis_(base.view().axis) {
    const std::uint64_t lines = axis_ == 1 ? base.rows() : base.cols();
    const std::uint64_t per = axis_ == 1 ? base.cols() : base.rows();
    const std::uint64_t k = std::clamp<std::uint64_t>((want + per - 1) / std::max<std::uint64_t>(per, 1), 1, lines);
    // Floyd's sampling of k distinct lines from a seeded counter stream.
    std::vector<std::uint64_t> pick;
    pick.reserve(k);
    std::uint64_t ctr = 0;
    std::vector<bool> taken(lines, false);
    for (std::uint64_t j = lines - k; j < lines; ++j) {
      const std::uint64_t t = rng::splitmix64(seed, ++ctr) % (j + 1);
      const std::uint64_t v = taken[t] ? j : t;
      taken[v] = true;
    }
    for (std::uint64_t i = 0; i < lines; ++i)
      if (taken[i]) pick.push_back(i);
    lines_ = std::move(pick);
  }
  std::uint64_t rows() const override { return axis_ == 1 ? lines_.size() : base_.rows(); }
  std::uint64_t cols() const override { return axis_ == 1 ? base_.cols() : lines_.size(); }
  std::string name() const override { return base_.name(); }
  void fill_rows(std::uint64_t row0, std::uint64_t nrows, float* out) const override {
    if (axis_ == 1) {
      for (std::uint64_t r = 0; r < nrows; ++r) base_.fill_rows(lines_[row0 + r], 1, out + r * base_.cols());
      return;
    }
    thread_local std::vector<float> row;
    row.resize(base_.cols());
    for (std::uint64_t r = 0; r < nrows; ++r) {
      base_.fill_rows(row0 + r, 1, row.data());
      for (std::size_t c = 0; c < lines_.size(); ++c) out[r * lines_.size() + c] = row[lines_[c]];
    }
  }
  std::uint64_t elements() const { return rows() * cols(); }

 private:
  const io::StoredTensorSource& base_;
  int axis_;
  std::vector<std::uint64_t> lines_;
};

struct TensorRow {
  std::size_t file_index = 0;
  std::string file, tensor, shape, axis_text;
  int axis = 1;
  std::uint64_t params = 0, scored = 0;
  bool assumed = false, inexact = false;
  ScoreRow s;
  std::string name;  // format as given
};

struct Total {
  std::string file, name, format;
  ErrorSums sums;
  std::vector<std::uint64_t> hist;
  double bits_weighted = 0, scale_share_weighted = 0;
  std::uint64_t params = 0, tensors = 0;
  ErrorReport report;
  double bits() const { return params ? bits_weighted / static_cast<double>(params) : 0; }
};

struct FileResult {
  std::string path, kind;
  std::uint64_t selected = 0, skipped = 0, params = 0;
  std::vector<std::string> skipped_text;
  std::string error;  // non-empty: the file failed
};

double sort_key(const ErrorReport& e) { return e.lossless ? INFINITY : e.sqnr_db.value_or(-INFINITY); }

}  // namespace

bool is_file_source(const std::string& text) {
  std::error_code ec;
  if (std::filesystem::exists(text, ec)) return true;
  const std::string ext = std::filesystem::path(text).extension().string();
  return text.find('/') != std::string::npos || ext == ".safetensors" || ext == ".npy" || ext == ".npz" ||
         ext == ".onnx" || ext == ".json";
}

void score_files(const FileScoreArgs& a) {
  std::vector<std::shared_ptr<const ScaledFormat>> fs;
  for (const auto& s : a.specs) fs.push_back(parse_scaled(s));
  const int hw = static_cast<int>(std::max(1u, std::thread::hardware_concurrency()));
  const int threads = a.threads > 0 ? a.threads : hw;
  const bool tty = isatty(2);

  std::vector<TensorRow> rows;
  std::vector<FileResult> files;
  std::map<std::pair<std::size_t, std::size_t>, Total> totals;  // (file, format)
  std::uint64_t assumed_axes = 0, inexact_axes = 0, nonfinite_tensors = 0;
  std::vector<std::string> warnings;

  for (std::size_t fi = 0; fi < a.paths.size(); ++fi) {
    const std::string& path = a.paths[fi];
    FileResult fr;
    fr.path = path;
    std::vector<TensorRow> file_rows;
    try {
      const auto ckpt = io::open_checkpoint(path);
      fr.kind = std::string(ckpt->kind());
      struct Job {
        std::size_t index;
        io::MatrixView view;
        io::AxisChoice choice;
      };
      std::vector<Job> jobs;
      for (std::size_t i = 0; i < ckpt->tensors().size(); ++i) {
        const io::TensorInfo& t = ckpt->tensors()[i];
        std::string why;
        if (!a.filter.selects(t, &why)) {
          ++fr.skipped;
          fr.skipped_text.push_back(fmt::format("{} ({})", t.name, why));
          continue;
        }
        io::AxisChoice c = io::choose_axes(t, a.axis_rules);
        io::MatrixView v = io::fold(t, c.reduce);
        jobs.push_back({i, std::move(v), std::move(c)});
      }
      if (jobs.empty())
        throw usage_error("no tensor selected", path,
                          fr.skipped ? "loosen --tensor / --min-rank / --min-elements (lobit fit lists the tensors)"
                                     : "the file holds no tensors");
      fr.selected = jobs.size();
      // Big tensors one at a time with every thread; small ones side by side, one thread
      // each. A tensor's figures do not depend on either.
      std::vector<std::vector<ScoreRow>> results(jobs.size());
      std::vector<std::uint64_t> scored(jobs.size());
      std::atomic<std::size_t> done{0};
      std::mutex progress_mu;
      auto report_progress = [&] {
        if (!tty) return;
        std::lock_guard lock(progress_mu);
        std::fprintf(stderr, "\rscoring %s: %zu of %zu tensors", path.c_str(), done.load(), jobs.size());
      };
      auto run = [&](std::size_t j, int nthreads) {
        const io::TensorInfo& t = ckpt->tensors()[jobs[j].index];
        io::StoredTensorSource src(*ckpt, jobs[j].index, jobs[j].view);
        ScoreOptions so;
        so.threads = nthreads;
        so.axis = jobs[j].view.axis;
        if (tty && t.count() >= (std::uint64_t{1} << 24))
          so.progress = [&, j](std::uint64_t d, std::uint64_t n) {
            std::lock_guard lock(progress_mu);
            std::fprintf(stderr, "\rscoring %s: %zu of %zu tensors, \"%s\" %3d%%", path.c_str(), done.load(),
                         jobs.size(), ckpt->tensors()[jobs[j].index].name.c_str(), static_cast<int>(100 * d / n));
          };
        ScoreResult r;
        if (a.subsample && a.subsample < t.count()) {
          // Keyed by the tensor's name (FNV-1a), so a tensor gets the same rows whatever else
          // is selected.
          std::uint64_t key = 0xcbf29ce484222325ull;
          for (unsigned char ch : t.name) key = (key ^ ch) * 0x100000001b3ull;
          SubsetSource sub(src, a.subsample, a.seed ^ key);
          r = score(fs, sub, so);
          scored[j] = sub.elements();
        } else {
          r = score(fs, src, so);
          scored[j] = t.count();
        }
        results[j] = std::move(r.rows);
        ++done;
        report_progress();
      };
      const std::uint64_t big = std::uint64_t{1} << 20;
      std::vector<std::size_t> small;
      for (std::size_t j = 0; j < jobs.size(); ++j) {
        if (ckpt->tensors()[jobs[j].index].count() >= big || threads == 1)
          run(j, threads);
        else
          small.push_back(j);
      }
      if (!small.empty()) {
        std::atomic<std::size_t> next{0};
        detail::run_threads(threads, [&](int) {
          for (std::size_t k; (k = next.fetch_add(1)) < small.size();) run(small[k], 1);
        });
      }
      if (tty) std::fprintf(stderr, "\r%120s\r", "");
      for (std::size_t j = 0; j < jobs.size(); ++j) {
        const io::TensorInfo& t = ckpt->tensors()[jobs[j].index];
        fr.params += t.count();
        const auto& c = jobs[j].choice;
        if (c.assumed) ++assumed_axes;
        if (!jobs[j].view.exact) {
          ++inexact_axes;
          warnings.push_back(fmt::format("{}: tensor \"{}\": the reduction axes ({}) are not contiguous in storage; "
                                         "scored along {} instead",
                                         path, t.name, c.reason, jobs[j].view.text));
        }
        if (t.dtype == io::DType::f64)
          warnings.push_back(fmt::format("{}: tensor \"{}\" is f64; lobit scores float32 inputs, so its values were "
                                         "rounded to the nearest float32 first",
                                         path, t.name));
        bool nonfinite = false;
        for (std::size_t k = 0; k < fs.size(); ++k) {
          TensorRow r;
          r.file_index = fi;
          r.file = path;
          r.tensor = t.name;
          r.shape = t.shape_text();
          r.axis_text = jobs[j].view.text + (c.assumed ? " (assumed)" : "");
          r.axis = jobs[j].view.axis;
          r.params = t.count();
          r.scored = scored[j];
          r.assumed = c.assumed;
          r.inexact = !jobs[j].view.exact;
          r.s = results[j][k];
          r.name = a.specs[k];
          nonfinite = nonfinite || r.s.report.nonfinite > 0;
          Total& tot = totals[{fi, k}];
          tot.file = path;
          tot.name = a.specs[k];
          tot.format = r.s.format;
          tot.sums.merge(r.s.sums);
          if (tot.hist.size() < r.s.histogram.size()) tot.hist.resize(r.s.histogram.size(), 0);
          for (std::size_t h = 0; h < r.s.histogram.size(); ++h) tot.hist[h] += r.s.histogram[h];
          tot.bits_weighted += r.s.bits_per_element * static_cast<double>(t.count());
          tot.scale_share_weighted += r.s.scale_bit_share * r.s.bits_per_element * static_cast<double>(t.count());
          tot.params += t.count();
          ++tot.tensors;
          file_rows.push_back(std::move(r));
        }
        if (nonfinite) {
          ++nonfinite_tensors;
          std::string groups;
          for (std::size_t k = 0; k < fs.size(); ++k)
            if (results[j][k].sums.nan_outputs)
              groups += fmt::format("; with {} their groups' scale is NaN, so {} finite values there are left out too",
                                    a.specs[k], results[j][k].sums.nan_outputs);
          warnings.push_back(fmt::format("{}: tensor \"{}\": {} NaN/Inf values, left out of every error sum{}", path,
                                         t.name, results[j][0].report.nonfinite, groups));
        }
      }
    } catch (const Error& e) {
      if (!a.keep_going || e.kind() != Error::Kind::usage) throw;
      fr.error = e.message();
      for (std::size_t k = 0; k < fs.size(); ++k) totals.erase({fi, k});
      file_rows.clear();
    }
    for (auto& r : file_rows) rows.push_back(std::move(r));
    files.push_back(std::move(fr));
  }
  for (auto& [key, t] : totals) t.report = make_report(t.sums, t.hist);

  // Worst first within each file.
  std::stable_sort(rows.begin(), rows.end(), [&](const TensorRow& x, const TensorRow& y) {
    if (x.file_index != y.file_index) return x.file_index < y.file_index;
    return sort_key(x.s.report) < sort_key(y.s.report);
  });
  std::uint64_t failed = 0;
  for (const auto& f : files) failed += !f.error.empty();
  if (assumed_axes)
    warnings.push_back(fmt::format("{} tensor(s) had no reduction axis in the file; the default by rank was assumed "
                                   "(rank 2: the last axis, as [out, in]; rank >= 4: axes 1..; set --axis GLOB=AXES)",
                                   assumed_axes));
  for (const auto& w : warnings) std::fprintf(stderr, "lobit: warning: %s\n", w.c_str());

  if (a.json) {
    nlohmann::json jr = nlohmann::json::array(), jt = nlohmann::json::array(), jf = nlohmann::json::array();
    for (const auto& r : rows) {
      nlohmann::json j = {{"file", r.file},
                          {"tensor", r.tensor},
                          {"shape", r.shape},
                          {"axis", r.axis_text},
                          {"axis_assumed", r.assumed},
                          {"parameters", r.params},
                          {"subsampled", r.scored < r.params},
                          {"format", r.s.format},
                          {"name", r.name},
                          {"bits_per_element", r.s.bits_per_element},
                          {"scale_bit_share", r.s.scale_bit_share},
                          {"ragged_last_block", r.s.ragged},
                          {"finite_inputs_in_nan_groups", r.s.sums.nan_outputs}};
      j.update(report_json(r.s.report, r.s.top_threshold));
      jr.push_back(std::move(j));
    }
    for (const auto& [key, t] : totals) {
      nlohmann::json j = {{"file", t.file}, {"format", t.format}, {"name", t.name}, {"tensors", t.tensors},
                          {"parameters", t.params}, {"bits_per_element", t.bits()},
                          {"scale_bit_share", t.bits_weighted > 0 ? t.scale_share_weighted / t.bits_weighted : 0.0}};
      j.update(report_json(t.report, NAN));  // per tensor: see the rows
      jt.push_back(std::move(j));
    }
    for (const auto& f : files) {
      nlohmann::json j = {{"path", f.path}, {"kind", f.kind}, {"tensors_scored", f.selected},
                          {"tensors_skipped", f.skipped}, {"parameters", f.params}, {"skipped", f.skipped_text}};
      j["error"] = f.error.empty() ? nlohmann::json(nullptr) : nlohmann::json(f.error);
      jf.push_back(std::move(j));
    }
    print_json({{"files", jf}, {"rows", jr}, {"totals", jt}, {"failed_files", failed}, {"warnings", warnings},
                {"caution", kCaution}});
  } else if (a.csv) {
    fmt::print("file,tensor,shape,axis,parameters,format,bits_per_element,mse,mse_normalised,sqnr_db,sqnr_low,"
               "sqnr_high,max_abs_err,clip_rate,zero_rate,nonfinite_inputs\n");
    auto num = [](const std::optional<double>& v) { return v ? fmt::format("{}", *v) : std::string(); };
    auto line = [&](const std::string& file, const std::string& tensor, const std::string& shape,
                    const std::string& axis, std::uint64_t params, const std::string& format, double bits,
                    const ErrorReport& e) {
      fmt::print("\"{}\",\"{}\",\"{}\",\"{}\",{},\"{}\",{},{},{},{},{},{},{},{},{},{}\n", file, tensor, shape, axis,
                 params, format, bits, e.mse, e.mse_normalised, num(e.sqnr_db), num(e.sqnr_low), num(e.sqnr_high),
                 e.max_abs_err, e.clip_rate, e.zero_rate, e.nonfinite);
    };
    for (const auto& r : rows)
      line(r.file, r.tensor, r.shape, r.axis_text, r.params, r.s.format, r.s.bits_per_element, r.s.report);
    for (const auto& [key, t] : totals) line(t.file, "(total)", "", "", t.params, t.format, t.bits(), t.report);
  } else {
    const bool md = a.md;
    for (std::size_t fi = 0; fi < files.size(); ++fi) {
      const FileResult& f = files[fi];
      if (!f.error.empty()) {
        fmt::print("{} FAILED: {}\n\n", md ? "###" : "#", f.error);
        continue;
      }
      fmt::print("{} {} ({}): {} tensors scored, {} parameters{}{}\n", md ? "###" : "#", f.path, f.kind, f.selected,
                 f.params, f.skipped ? fmt::format(", {} skipped", f.skipped) : "",
                 a.subsample ? fmt::format(", about {} elements sampled per tensor (seed {})", a.subsample, a.seed)
                             : "");
      std::size_t wt = 6, wf = 6, wa = 4;
      for (const auto& r : rows)
        if (r.file_index == fi) {
          wt = std::max(wt, r.tensor.size());
          wf = std::max(wf, r.name.size());
          wa = std::max(wa, r.axis_text.size());
        }
      if (md) {
        fmt::print("\n| tensor | reduced over | format | bits/element | MSE | SQNR dB [95%] | max error | clip % | zero % |\n");
        fmt::print("|---|---|---|---:|---:|---:|---:|---:|---:|\n");
      } else {
        fmt::print("{:<{}}  {:<{}}  {:<{}}  {:>9}  {:>11}  {:<27}  {:>10}  {:>7}  {:>7}\n", "tensor", wt,
                   "reduced over", wa, "format", wf, "bits/elem", "MSE", "SQNR dB [95%]", "max err", "clip %",
                   "zero %");
      }
      auto print_row = [&](const std::string& tensor, const std::string& axis, const std::string& name, double bits,
                           const ErrorReport& e) {
        if (md)
          fmt::print("| `{}` | {} | `{}` | {:.6g} | {:.6g} | {} | {:.6g} | {:.4g} | {:.4g} |\n", tensor, axis, name,
                     bits, e.mse, sqnr_text(e), e.max_abs_err, 100 * e.clip_rate, 100 * e.zero_rate);
        else
          fmt::print("{:<{}}  {:<{}}  {:<{}}  {:>9.6g}  {:>11.5g}  {:<27}  {:>10.4g}  {:>7.4g}  {:>7.4g}\n", tensor, wt,
                     axis, wa, name, wf, bits, e.mse, sqnr_text(e), e.max_abs_err, 100 * e.clip_rate,
                     100 * e.zero_rate);
      };
      for (const auto& r : rows)
        if (r.file_index == fi) print_row(r.tensor, r.axis_text, r.name, r.s.bits_per_element, r.s.report);
      for (const auto& [key, t] : totals)
        if (key.first == fi)
          print_row(fmt::format("(total, {} tensors)", t.tensors), "parameter-weighted", t.name, t.bits(), t.report);
      fmt::print("\n");
    }
    if (failed) fmt::print("{} {} of {} files failed\n", md ? "**" : "#", failed, files.size());
    fmt::print("{} totals merge every scored element: MSE over all parameters, SQNR of the summed signal and error "
               "power; the top-magnitude figures are per tensor\n",
               md ? "" : "#");
    if (!md) fmt::print("# lobit {} (git {})\n", version(), git_revision());
    fmt::print("{} {}\n", md ? "" : "#", kCaution);
  }
  if (failed)
    throw usage_error(fmt::format("{} of {} files failed (reported above)", failed, files.size()), "score");
}

}  // namespace lobit::cli
