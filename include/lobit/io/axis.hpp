#pragma once
// Which axes a weight is reduced over (the axes a per-channel or per-block scale runs
// along). It depends on the operator that consumes the weight, not on the file format:
// an ONNX graph says it (the reader's AxisHint); otherwise a documented default by rank,
// which the caller reports as assumed; the user overrides per name pattern.
#include <string>
#include <string_view>
#include <vector>

#include "lobit/io/checkpoint.hpp"

namespace lobit::io {

// `GLOB=AXES`: AXES is a comma list of axis numbers or ranges ("1", "0", "1-3", "1,2,3"),
// "last" or "first"; negative numbers count from the end ("-1").
struct AxisRule {
  std::string glob;
  std::string axes;  // as given, resolved per tensor (the rank is not known here)
};
// Throws lobit::Error (usage) with a hint for malformed text.
AxisRule parse_axis_rule(std::string_view text);

struct AxisChoice {
  std::vector<int> reduce;  // sorted logical axes
  std::string reason;       // "from the graph: MatMul 'fc1' input B [K, N]", "rule 'enc.*=0'", "default for rank 2"
  bool assumed = false;     // neither the file nor a rule said it: the caller warns
};

// The first matching rule wins, then the file's hint, then the default:
//   rank 0-1: the only axis; rank 2: the last axis ([out, in], as a PyTorch-style
//   linear layer stores it); rank 3: the last axis; rank >= 4: axes 1..rank-1
//   (a convolution weight [out, in, kh, kw, ...]).
// Throws lobit::Error (usage) when a matching rule names an axis the tensor lacks.
AxisChoice choose_axes(const TensorInfo& t, const std::vector<AxisRule>& rules);

// Shell-style pattern: '*' any run (also across '.' and '/'), '?' one character,
// '[abc]' / '[a-z]' / '[!a]' a set. Everything else literal.
bool glob_match(std::string_view pattern, std::string_view text);

}  // namespace lobit::io
