#include "report_text.hpp"

#include <fmt/format.h>

namespace lobit::cli {
namespace {
nlohmann::json opt(const std::optional<double>& v) { return v ? nlohmann::json(*v) : nlohmann::json(nullptr); }
}  // namespace

std::string sqnr_text(const ErrorReport& e) {
  if (e.lossless) return "lossless";
  if (!e.sqnr_db) return "-";
  std::string s = fmt::format("{:.3f}", *e.sqnr_db);
  if (e.sqnr_low)
    s += fmt::format(" [{:.3f}, {}]", *e.sqnr_low, e.sqnr_high ? fmt::format("{:.3f}", *e.sqnr_high) : "inf");
  return s;
}

nlohmann::json report_json(const ErrorReport& e, double top_threshold) {
  return {{"scored_elements", e.n},
          {"mse", e.mse},
          {"mse_normalised", e.mse_normalised},
          {"mse_stderr", e.mse_stderr},
          {"sqnr_db", opt(e.sqnr_db)},
          {"lossless", e.lossless},
          {"sqnr_db_95", {opt(e.sqnr_low), opt(e.sqnr_high)}},
          {"max_abs_err", e.max_abs_err},
          {"max_err_rel_absmax", e.max_err_rel_absmax},
          {"mean_rel_err", e.mean_rel_err},
          {"clip_rate", e.clip_rate},
          {"zero_rate", e.zero_rate},
          {"top_magnitudes", {{"threshold", top_threshold}, {"count", e.top_n}, {"mse", e.top_mse}}},
          {"codes_used", e.codes_used},
          {"entropy_bits", e.entropy_bits},
          {"groups", {{"count", e.groups}, {"scale_saturated", e.saturated_groups},
                      {"scale_underflow", e.underflow_groups}, {"nan", e.nan_groups}}},
          {"nonfinite_inputs", e.nonfinite}};
}

}  // namespace lobit::cli
