#pragma once
// `lobit score FORMAT... --source PATH...`: formats scored on the tensors of checkpoint files.
#include <string>
#include <vector>

#include "checkpoint_args.hpp"

namespace lobit::cli {

struct FileScoreArgs {
  std::vector<std::string> specs;   // as given
  std::vector<std::string> paths;
  TensorFilter filter;
  std::vector<io::AxisRule> axis_rules;
  int threads = 0;
  std::uint64_t subsample = 0;  // 0: every element; else about this many elements per tensor
  std::uint64_t seed = 0;
  bool keep_going = false;
  bool json = false, csv = false, md = false;
};

// Whether a --source value names a file rather than a synthetic source.
bool is_file_source(const std::string& text);

void score_files(const FileScoreArgs& args);

}  // namespace lobit::cli
