// Reduction-axis rules: user patterns, the file's hint, defaults by rank.
#include "lobit/io/axis.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <charconv>

#include "lobit/error.hpp"

namespace lobit::io {
namespace {

const char* kAxesHint = "write GLOB=AXES, e.g. 'encoder.*=0', '*.weight=last' or 'conv*=1-3'";

// An axis number of a rule. With a tensor, negative numbers count from its end and the
// number must name one of its axes; without one (checking a rule as it is parsed) only
// the spelling is checked.
int parse_axis_number(std::string_view s, const TensorInfo* t, const std::string& rule) {
  int v = 0;
  const char* b = s.data();
  const char* e = s.data() + s.size();
  auto [p, ec] = std::from_chars(b, e, v);
  if (ec != std::errc() || p != e)
    throw usage_error(fmt::format("'{}' is not an axis number", s), fmt::format("--axis {}", rule), kAxesHint);
  if (!t) return v;
  const int rank = static_cast<int>(t->shape.size());
  const int r = std::max(rank, 1);
  if (v < 0) v += r;
  if (v < 0 || v >= r)
    throw usage_error(
        fmt::format("tensor \"{}\" has rank {} {}, so it has no axis {}", t->name, rank, t->shape_text(), s),
        fmt::format("--axis {}", rule), "narrow the pattern or use an axis from 0 to rank - 1");
  return v;
}

// The axes a rule names for tensor t (sorted, no repeats); t null: the syntax only.
std::vector<int> resolve(const AxisRule& rule, const TensorInfo* t) {
  const int rank = t ? static_cast<int>(t->shape.size()) : 1;
  const std::string text = rule.glob + "=" + rule.axes;
  if (rule.axes == "last") return {std::max(rank, 1) - 1};
  if (rule.axes == "first") return {0};
  std::vector<int> out;
  std::string_view rest = rule.axes;
  while (!rest.empty()) {
    const std::size_t comma = rest.find(',');
    std::string_view item = rest.substr(0, comma);
    rest = comma == std::string_view::npos ? std::string_view{} : rest.substr(comma + 1);
    const std::size_t dash = item.find('-', 1);  // a leading '-' is a sign
    if (dash != std::string_view::npos) {
      const int a = parse_axis_number(item.substr(0, dash), t, text);
      const int b = parse_axis_number(item.substr(dash + 1), t, text);
      // Without a tensor, a range with a negative end is ordered only once resolved.
      if (b < a && (t || (a >= 0 && b >= 0)))
        throw usage_error(fmt::format("the range {} runs backwards", item), fmt::format("--axis {}", text), kAxesHint);
      for (int k = a; k <= b && t; ++k) out.push_back(k);
    } else {
      out.push_back(parse_axis_number(item, t, text));
    }
  }
  std::sort(out.begin(), out.end());
  out.erase(std::unique(out.begin(), out.end()), out.end());
  return out;
}

bool set_match(std::string_view pat, std::size_t& i, char c) {
  // pat[i] == '['; on return i is past the closing ']'.
  std::size_t j = i + 1;
  const bool negate = j < pat.size() && (pat[j] == '!' || pat[j] == '^');
  if (negate) ++j;
  bool hit = false, first = true;
  for (; j < pat.size() && (first || pat[j] != ']'); ++j, first = false) {
    if (j + 2 < pat.size() && pat[j + 1] == '-' && pat[j + 2] != ']') {
      hit = hit || (c >= pat[j] && c <= pat[j + 2]);
      j += 2;
    } else {
      hit = hit || c == pat[j];
    }
  }
  i = j + 1;
  return hit != negate;
}

}  // namespace

AxisRule parse_axis_rule(std::string_view text) {
  const std::size_t eq = text.rfind('=');
  if (eq == std::string_view::npos || eq == 0 || eq + 1 == text.size())
    throw usage_error(fmt::format("'{}' is not a rule", text), "--axis", kAxesHint);
  AxisRule r{std::string(text.substr(0, eq)), std::string(text.substr(eq + 1))};
  (void)resolve(r, nullptr);  // the spelling now; the axes against each matching tensor later
  return r;
}

AxisChoice choose_axes(const TensorInfo& t, const std::vector<AxisRule>& rules) {
  for (const AxisRule& r : rules)
    if (glob_match(r.glob, t.name)) return {resolve(r, &t), fmt::format("rule '{}={}'", r.glob, r.axes), false};
  if (t.axis_hint && !t.axis_hint->reduce.empty())
    return {t.axis_hint->reduce, "from the graph: " + t.axis_hint->reason, false};
  const int rank = static_cast<int>(t.shape.size());
  if (rank <= 1) return {{0}, "the only axis", false};
  if (rank <= 3) return {{rank - 1}, fmt::format("default for rank {}: the last axis", rank), true};
  std::vector<int> r;
  for (int k = 1; k < rank; ++k) r.push_back(k);
  return {r, fmt::format("default for rank {}: axes 1-{} (a convolution weight [out, in, k...])", rank, rank - 1),
          true};
}

bool glob_match(std::string_view pat, std::string_view text) {
  // Iterative matcher with one backtrack point for the last '*' (linear in practice).
  std::size_t p = 0, s = 0, star = std::string_view::npos, mark = 0;
  while (s < text.size()) {
    if (p < pat.size() && pat[p] == '*') {
      star = p++;
      mark = s;
      continue;
    }
    if (p < pat.size() && pat[p] == '?') {
      ++p, ++s;
      continue;
    }
    if (p < pat.size() && pat[p] == '[' && pat.find(']', p + 2) != std::string_view::npos) {
      std::size_t q = p;
      if (set_match(pat, q, text[s])) {
        p = q, ++s;
        continue;
      }
    } else if (p < pat.size() && pat[p] == text[s]) {
      ++p, ++s;
      continue;
    }
    if (star == std::string_view::npos) return false;
    p = star + 1;
    s = ++mark;
  }
  while (p < pat.size() && pat[p] == '*') ++p;
  return p == pat.size();
}

}  // namespace lobit::io
