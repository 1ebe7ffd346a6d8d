#pragma once
// How an ErrorReport reads in the score tables and JSON, for synthetic sources and files alike.
#include <nlohmann/json.hpp>
#include <string>

#include "lobit/measure/metrics.hpp"

namespace lobit::cli {

// "18.697 [18.459, 18.949]", "lossless", or "-" when there is no signal.
std::string sqnr_text(const ErrorReport& e);

// The report's figures as JSON (scored_elements, mse, sqnr_db and its interval, ...);
// top_threshold: |x| at or above which an input counts as a top magnitude.
nlohmann::json report_json(const ErrorReport& e, double top_threshold);

}  // namespace lobit::cli
