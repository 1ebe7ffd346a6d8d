#pragma once
// Options shared by the CLI commands that read checkpoint files (score, fit, quantize):
// which tensors to take, and which reduction axes to use.
#include <CLI/CLI.hpp>
#include <string>
#include <vector>

#include "lobit/io/axis.hpp"
#include "lobit/io/checkpoint.hpp"

namespace lobit::cli {

struct TensorFilter {
  std::vector<std::string> include;  // --tensor GLOB (repeatable; none = all)
  std::vector<std::string> exclude;  // --skip-tensor GLOB
  int min_rank = 0;                  // --min-rank N
  std::uint64_t min_elements = 0;    // --min-elements N
  bool floating_only = true;         // integer tensors are skipped (listed as skipped) unless named

  void add_options(CLI::App& cmd);
  // Whether tensor t is taken; `why_not` gets the reason when not.
  bool selects(const io::TensorInfo& t, std::string* why_not = nullptr) const;
};

struct AxisOptions {
  std::vector<std::string> rules_text;  // --axis GLOB=AXES (repeatable)
  std::vector<io::AxisRule> rules;      // parsed by resolve()

  void add_options(CLI::App& cmd);
  void resolve();  // parses rules_text; throws lobit::Error (usage)
  io::AxisChoice choose(const io::TensorInfo& t) const { return io::choose_axes(t, rules); }
};

}  // namespace lobit::cli
