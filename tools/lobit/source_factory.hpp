#pragma once
// The CLI's sources: synthetic distributions by spec text (files come later).
#include <memory>
#include <string>

#include "lobit/measure/score.hpp"

namespace lobit::cli {

// spec: a synthetic source spec (see `lobit score --help`); samples: the count for
// the scalar distributions; shape: "ROWSxCOLS" or empty.
std::unique_ptr<TensorSource> make_source(const std::string& spec, std::uint64_t samples, std::uint64_t seed,
                                          const std::string& shape);

}  // namespace lobit::cli
