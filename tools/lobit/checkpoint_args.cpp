#include "checkpoint_args.hpp"

#include <fmt/format.h>

#include "lobit/error.hpp"

namespace lobit::cli {

void TensorFilter::add_options(CLI::App& cmd) {
  cmd.add_option("--tensor", include, "Take only tensors whose name matches this pattern (* ? [..]; repeatable)")
      ->type_name("GLOB");
  cmd.add_option("--skip-tensor", exclude, "Leave out tensors whose name matches this pattern (repeatable)")
      ->type_name("GLOB");
  cmd.add_option("--min-rank", min_rank, "Take only tensors of at least this many axes (2: leave out biases, norms)")
      ->check(CLI::Range(0, 64));
  cmd.add_option("--min-elements", min_elements, "Take only tensors of at least this many elements");
}

bool TensorFilter::selects(const io::TensorInfo& t, std::string* why_not) const {
  auto no = [&](std::string why) {
    if (why_not) *why_not = std::move(why);
    return false;
  };
  bool named = include.empty();
  for (const auto& g : include) named = named || io::glob_match(g, t.name);
  if (!named) return no("not matched by --tensor");
  for (const auto& g : exclude)
    if (io::glob_match(g, t.name)) return no(fmt::format("matched by --skip-tensor {}", g));
  if (static_cast<int>(t.shape.size()) < min_rank) return no(fmt::format("rank {} < --min-rank", t.shape.size()));
  const std::uint64_t n = t.count();
  if (n < min_elements) return no(fmt::format("{} elements < --min-elements", n));
  if (n == 0) return no("empty (a zero in its shape)");
  if (floating_only && !io::is_floating(t.dtype))
    return no(fmt::format("integer type {} (lobit scores floating-point weights)", io::dtype_name(t.dtype)));
  return true;
}

void AxisOptions::add_options(CLI::App& cmd) {
  cmd.add_option("--axis", rules_text,
                 "Reduction axes for tensors matching a pattern, first match wins: GLOB=AXES with AXES a list "
                 "or range of axis numbers, 'first' or 'last' (e.g. 'fc*=1', 'conv*=1-3'); repeatable")
      ->type_name("GLOB=AXES");
}

void AxisOptions::resolve() {
  rules.clear();
  for (const auto& r : rules_text) rules.push_back(io::parse_axis_rule(r));
}

}  // namespace lobit::cli
