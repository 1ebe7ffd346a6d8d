#include "lobit/source/synthetic.hpp"

#include <algorithm>
#include <bit>
#include <boost/math/distributions/laplace.hpp>
#include <boost/math/distributions/logistic.hpp>
#include <boost/math/distributions/normal.hpp>
#include <boost/math/distributions/students_t.hpp>
#include <boost/math/distributions/uniform.hpp>
#include <charconv>
#include <cmath>
#include <cstdlib>
#include <fmt/format.h>
#include <limits>
#include <unordered_set>
#include <utility>

#include "lobit/detail/edit_distance.hpp"
#include "lobit/error.hpp"
#include "lobit/source/random.hpp"

namespace lobit {

namespace {

// ---------------------------------------------------------------------------
// Names, defaults, parsing

constexpr std::uint64_t max_elements = std::uint64_t{1} << 62;
constexpr std::uint64_t max_planted = std::uint64_t{1} << 20;
constexpr double max_spread = 10.0;
constexpr std::uint64_t default_channel_cols = 4096;
constexpr std::uint64_t llm_rows = 4096, llm_cols = 11008;

// Stream numbers of the roles (see random.hpp: one key per (seed, stream)).
enum Stream : std::uint64_t { bulk = 0, select = 1, row_scales = 2, planted_positions = 3, planted_values = 4 };

struct NamedKind {
  std::string_view name;
  SourceKind kind;
};
constexpr NamedKind kinds[] = {
    {"gauss", SourceKind::gauss},       {"laplace", SourceKind::laplace},
    {"uniform", SourceKind::uniform},   {"logistic", SourceKind::logistic},
    {"student-t", SourceKind::student_t}, {"outliers", SourceKind::outliers},
    {"channel-scaled", SourceKind::channel_scaled}, {"llm", SourceKind::llm},
};
constexpr NamedKind aliases[] = {{"normal", SourceKind::gauss}, {"gaussian", SourceKind::gauss}};

const char* keys_of(SourceKind k) {
  switch (k) {
    case SourceKind::student_t: return "nu, unit-variance, rows, cols";
    case SourceKind::outliers: return "fraction, size, rows, cols";
    case SourceKind::channel_scaled: return "spread, rows, cols";
    case SourceKind::llm: return "spread, size, outliers, nu, rows, cols";
    default: return "rows, cols";
  }
}

using detail::edit_distance;

std::string nearest_names(std::string_view name) {
  std::vector<std::pair<std::size_t, std::string_view>> scored;
  for (const auto& k : kinds) scored.emplace_back(edit_distance(name, k.name), k.name);
  std::stable_sort(scored.begin(), scored.end(), [](auto& a, auto& b) { return a.first < b.first; });
  return fmt::format("{}, {} or {}", scored[0].second, scored[1].second, scored[2].second);
}

double parse_number(std::string_view key, std::string_view text) {
  const std::string s(text);
  char* end = nullptr;
  const double v = std::strtod(s.c_str(), &end);
  if (s.empty() || end != s.c_str() + s.size() || std::isspace(static_cast<unsigned char>(s[0])))
    throw usage_error(fmt::format("{}={} is not a number", key, text), "source spec",
                      fmt::format("write {}=<decimal number>", key));
  if (!std::isfinite(v))
    throw usage_error(fmt::format("{}={} is not finite", key, text), "source spec",
                      fmt::format("write {}=<finite number>", key));
  return v;
}

std::uint64_t parse_count(std::string_view key, std::string_view text) {
  std::uint64_t v = 0;
  auto [p, ec] = std::from_chars(text.data(), text.data() + text.size(), v);
  if (text.empty() || ec != std::errc() || p != text.data() + text.size())
    throw usage_error(fmt::format("{}={} is not a whole number", key, text), "source spec",
                      fmt::format("write {}=<non-negative integer>", key));
  return v;
}

bool parse_yes_no(std::string_view key, std::string_view text) {
  if (text == "yes" || text == "on" || text == "true") return true;
  if (text == "no" || text == "off" || text == "false") return false;
  throw usage_error(fmt::format("{}={} is not yes or no", key, text), "source spec",
                    fmt::format("write {}=yes or {}=no", key, key));
}

bool has_key(SourceKind kind, std::string_view key) {
  if (key == "rows" || key == "cols") return true;
  switch (kind) {
    case SourceKind::student_t: return key == "nu" || key == "unit-variance";
    case SourceKind::outliers: return key == "fraction" || key == "size";
    case SourceKind::channel_scaled: return key == "spread";
    case SourceKind::llm: return key == "spread" || key == "size" || key == "outliers" || key == "nu";
    default: return false;
  }
}

[[noreturn]] void bad(std::string what, std::string hint) {
  throw usage_error(std::move(what), "source spec", std::move(hint));
}

// ---------------------------------------------------------------------------
// Kernels: one loop per variate, element j of the call is word(key, first + j).
// The loop bodies are branch-free integer and IEEE arithmetic (random.hpp), so
// GCC vectorises them; on x86-64 each kernel is compiled for AVX-512, AVX2 and
// the baseline and picked at load time (target_clones). The results are the same
// for every clone: only the vector width differs.

#if defined(__GNUC__) && !defined(__clang__) && defined(__x86_64__) && defined(__ELF__) && !defined(LOBIT_NO_CLONES)
#define LOBIT_VECTOR_CLONES __attribute__((target_clones("arch=x86-64-v4", "arch=x86-64-v3", "default")))
#else
#define LOBIT_VECTOR_CLONES
#endif

struct KernelArgs {
  std::uint64_t key = 0;
  std::uint64_t key2 = 0;          // outliers: the selection stream
  double mult = 1.0;               // applied to every variate (row scale, unit-variance factor)
  double nu = 0, two_over_nu = 0;  // student-t
  double size = 0;                 // outliers
  std::int64_t threshold = 0;      // outliers: an element is one when (v >> 11) < threshold
};

template <class T, class Variate>
inline __attribute__((always_inline)) void variate_loop(std::uint64_t key, double mult, std::uint64_t first,
                                                        T* __restrict out, std::size_t n, Variate variate) {
  const std::uint64_t s0 = key + (first + 1) * rng::golden_gamma;
  for (std::size_t j = 0; j < n; ++j) out[j] = static_cast<T>(mult * variate(rng::mix64(s0 + j * rng::golden_gamma)));
}

template <class T>
inline __attribute__((always_inline)) void outlier_loop(const KernelArgs& a, std::uint64_t first, T* __restrict out,
                                                        std::size_t n) {
  const std::uint64_t s0 = a.key + (first + 1) * rng::golden_gamma;
  const std::uint64_t s1 = a.key2 + (first + 1) * rng::golden_gamma;
  const std::int64_t threshold = a.threshold;
  const std::uint64_t size_bits = std::bit_cast<std::uint64_t>(a.size);
  for (std::size_t j = 0; j < n; ++j) {
    const double z = rng::gauss(rng::mix64(s0 + j * rng::golden_gamma));
    const std::uint64_t v = rng::mix64(s1 + j * rng::golden_gamma);
    const double o = std::bit_cast<double>(size_bits | (v << 63));  // sign from bit 0, choice from bits 11..63
    out[j] = static_cast<T>(rng::detail::select(static_cast<std::int64_t>(v >> 11) < threshold, o, z));
  }
}

#define LOBIT_KERNEL_PAIR(name, ...)                                                                       \
  LOBIT_VECTOR_CLONES void name(const KernelArgs& a, std::uint64_t first, float* __restrict out,           \
                                std::size_t n) {                                                           \
    __VA_ARGS__;                                                                                           \
  }                                                                                                        \
  LOBIT_VECTOR_CLONES void name(const KernelArgs& a, std::uint64_t first, double* __restrict out,          \
                                std::size_t n) {                                                           \
    __VA_ARGS__;                                                                                           \
  }

LOBIT_KERNEL_PAIR(kernel_gauss, variate_loop(a.key, a.mult, first, out, n, [](std::uint64_t w) { return rng::gauss(w); }))
LOBIT_KERNEL_PAIR(kernel_laplace,
                  variate_loop(a.key, a.mult, first, out, n, [](std::uint64_t w) { return rng::laplace(w); }))
LOBIT_KERNEL_PAIR(kernel_uniform,
                  variate_loop(a.key, a.mult, first, out, n, [](std::uint64_t w) { return rng::uniform(w); }))
LOBIT_KERNEL_PAIR(kernel_logistic,
                  variate_loop(a.key, a.mult, first, out, n, [](std::uint64_t w) { return rng::logistic(w); }))
LOBIT_KERNEL_PAIR(kernel_student_t, const double nu = a.nu; const double two_over_nu = a.two_over_nu;
                  variate_loop(a.key, a.mult, first, out, n,
                               [nu, two_over_nu](std::uint64_t w) { return rng::student_t(w, nu, two_over_nu); }))
LOBIT_KERNEL_PAIR(kernel_outliers, outlier_loop(a, first, out, n))

#undef LOBIT_KERNEL_PAIR

}  // namespace

// ---------------------------------------------------------------------------
// Spec

std::string_view source_name(SourceKind kind) {
  for (const auto& k : kinds)
    if (k.kind == kind) return k.name;
  return "?";
}

const std::vector<std::string_view>& source_names() {
  static const std::vector<std::string_view> names = [] {
    std::vector<std::string_view> v;
    for (const auto& k : kinds) v.push_back(k.name);
    return v;
  }();
  return names;
}

SourceSpec default_source(SourceKind kind) {
  SourceSpec s;
  s.kind = kind;
  switch (kind) {
    case SourceKind::outliers:
      s.fraction = 0.001;
      s.size = 20;
      break;
    case SourceKind::channel_scaled:
      s.spread = 0.5;
      s.cols = default_channel_cols;
      break;
    case SourceKind::llm:
      s.spread = 0.3;
      s.size = 100;
      s.outlier_count = 8;
      s.rows = llm_rows;
      s.cols = llm_cols;
      break;
    default: break;
  }
  return s;
}

void validate(const SourceSpec& s) {
  const std::string_view name = source_name(s.kind);
  if (name == "?") throw usage_error("unknown source kind", "source spec");
  const SourceSpec d = default_source(s.kind);
  auto stray = [&](bool differs, const char* key) {
    if (differs) bad(fmt::format("'{}' does not apply to a {} source", key, name), fmt::format("keys of {}: {}", name, keys_of(s.kind)));
  };
  const bool has_nu = s.kind == SourceKind::student_t || s.kind == SourceKind::llm;
  const bool has_size = s.kind == SourceKind::outliers || s.kind == SourceKind::llm;
  const bool has_spread = s.kind == SourceKind::channel_scaled || s.kind == SourceKind::llm;
  stray(!has_nu && s.nu != d.nu, "nu");
  stray(s.kind != SourceKind::student_t && s.unit_variance, "unit-variance");
  stray(s.kind != SourceKind::outliers && s.fraction != d.fraction, "fraction");
  stray(!has_size && s.size != d.size, "size");
  stray(!has_spread && s.spread != d.spread, "spread");
  stray(s.kind != SourceKind::llm && s.outlier_count != d.outlier_count, "outliers");

  if (s.kind == SourceKind::student_t) {
    if (s.nu == 0) bad("student-t needs its degrees of freedom", "write student-t+nu=<number > 0>, e.g. student-t+nu=3");
    if (!(s.nu > 0) || !std::isfinite(s.nu))
      bad(fmt::format("nu={} is not a positive finite number", s.nu), "the degrees of freedom must be > 0");
    if (s.unit_variance && !(s.nu > 2))
      bad(fmt::format("unit-variance needs nu > 2 (the variance is infinite or undefined for nu={})", s.nu),
          "give nu > 2 or drop unit-variance");
  }
  if (s.kind == SourceKind::llm && s.nu != 0 && !(s.nu > 2 && std::isfinite(s.nu)))
    bad(fmt::format("nu={} for the llm bulk: it is scaled to unit variance, so nu must be > 2", s.nu),
        "give nu > 2, or leave nu out for a Gaussian bulk");
  if (s.kind == SourceKind::outliers && !(s.fraction >= 0 && s.fraction <= 1))
    bad(fmt::format("fraction={} is outside [0, 1]", s.fraction), "the outlier fraction is a probability, e.g. 0.001");
  if (has_size && !(s.size > 0 && std::isfinite(s.size)))
    bad(fmt::format("size={} is not a positive finite number", s.size), "the outlier magnitude in standard deviations, e.g. 20");
  if (has_spread && !(s.spread >= 0 && s.spread <= max_spread))
    bad(fmt::format("spread={} is outside [0, {}]", s.spread, max_spread),
        "the standard deviation of ln(row scale), e.g. 0.5");
  if (s.rows != 0 && s.cols != 0 && s.rows > max_elements / s.cols)
    bad(fmt::format("{} x {} elements are too many", s.rows, s.cols), "at most 2^62 elements");
  if (s.kind == SourceKind::llm) {
    if (s.outlier_count > max_planted)
      bad(fmt::format("outliers={} is more than {} planted outliers", s.outlier_count, max_planted),
          "for a fraction of outliers use the outliers source");
    if (s.rows != 0 && s.cols != 0 && s.outlier_count > s.rows * s.cols)
      bad(fmt::format("outliers={} is more than the {} x {} elements", s.outlier_count, s.rows, s.cols),
          "plant fewer outliers or enlarge the matrix");
  }
}

SourceSpec parse_source(std::string_view text) {
  if (text.empty())
    bad("empty source spec", fmt::format("name a source: {}", fmt::join(source_names(), ", ")));
  for (char c : text)
    if (std::isspace(static_cast<unsigned char>(c)))
      bad(fmt::format("a source spec has no spaces: '{}'", text), "join parts with '+', e.g. student-t+nu=3");
  const std::size_t plus = text.find('+');
  const std::string_view head = text.substr(0, plus);
  const NamedKind* found = nullptr;
  for (const auto& k : kinds)
    if (k.name == head) found = &k;
  for (const auto& k : aliases)
    if (k.name == head) found = &k;
  if (!found)
    throw usage_error(fmt::format("unknown source '{}'", head), "source spec",
                      fmt::format("did you mean {}? sources: {}", nearest_names(head), fmt::join(source_names(), ", ")));
  SourceSpec s = default_source(found->kind);
  const std::string_view name = source_name(s.kind);

  std::vector<std::string_view> seen;
  std::string_view rest = plus == std::string_view::npos ? std::string_view{} : text.substr(plus + 1);
  bool more = plus != std::string_view::npos;
  while (more) {
    const std::size_t next = rest.find('+');
    const std::string_view item = rest.substr(0, next);
    more = next != std::string_view::npos;
    rest = more ? rest.substr(next + 1) : std::string_view{};
    const std::size_t eq = item.find('=');
    if (item.empty() || eq == std::string_view::npos || eq == 0 || eq + 1 == item.size())
      bad(fmt::format("'{}' is not key=value", item), fmt::format("keys of {}: {}", name, keys_of(s.kind)));
    const std::string_view key = item.substr(0, eq), value = item.substr(eq + 1);
    if (!has_key(s.kind, key))
      bad(fmt::format("unknown key '{}' for a {} source", key, name), fmt::format("keys of {}: {}", name, keys_of(s.kind)));
    if (std::find(seen.begin(), seen.end(), key) != seen.end())
      bad(fmt::format("'{}' is given twice", key), "give each key once");
    seen.push_back(key);
    if (key == "rows" || key == "cols") {
      const std::uint64_t v = parse_count(key, value);
      if (v == 0) bad(fmt::format("{}=0: a source needs at least one {}", key, key == "rows" ? "row" : "column"), "give a count >= 1");
      (key == "rows" ? s.rows : s.cols) = v;
    } else if (key == "nu") {
      s.nu = parse_number(key, value);
      if (!(s.nu > 0)) bad(fmt::format("nu={} is not positive", value), "the degrees of freedom must be > 0");
    } else if (key == "unit-variance") {
      s.unit_variance = parse_yes_no(key, value);
    } else if (key == "fraction") {
      s.fraction = parse_number(key, value);
    } else if (key == "size") {
      s.size = parse_number(key, value);
    } else if (key == "spread") {
      s.spread = parse_number(key, value);
    } else if (key == "outliers") {
      s.outlier_count = parse_count(key, value);
    }
  }
  validate(s);
  return s;
}

std::string canonical(const SourceSpec& s) {
  std::string out(source_name(s.kind));
  switch (s.kind) {
    case SourceKind::student_t:
      out += fmt::format("+nu={}", s.nu);
      if (s.unit_variance) out += "+unit-variance=yes";
      break;
    case SourceKind::outliers: out += fmt::format("+fraction={}+size={}", s.fraction, s.size); break;
    case SourceKind::channel_scaled: out += fmt::format("+spread={}", s.spread); break;
    case SourceKind::llm:
      out += fmt::format("+spread={}+size={}+outliers={}", s.spread, s.size, s.outlier_count);
      if (s.nu != 0) out += fmt::format("+nu={}", s.nu);
      break;
    default: break;
  }
  if (s.rows != 0) out += fmt::format("+rows={}", s.rows);
  if (s.cols != 0) out += fmt::format("+cols={}", s.cols);
  return out;
}

// ---------------------------------------------------------------------------
// Source

SyntheticSource::SyntheticSource(std::string_view spec, std::uint64_t seed, std::uint64_t default_count)
    : SyntheticSource(parse_source(spec), seed, default_count) {}

SyntheticSource::SyntheticSource(const SourceSpec& spec, std::uint64_t seed, std::uint64_t default_count)
    : spec_(spec), seed_(seed) {
  validate(spec_);
  // The shape: both given; one given and the other from the count; or the family default.
  auto ceil_div = [](std::uint64_t a, std::uint64_t b) { return a / b + (a % b != 0); };
  auto need_count = [&] {
    if (default_count == 0)
      throw usage_error(fmt::format("the shape of '{}' is open and no element count was given", canonical(spec_)),
                        "source spec", "give +rows=R+cols=C or a sample count");
  };
  if (spec_.rows == 0 && spec_.cols == 0) {
    need_count();
    spec_.rows = 1;
    spec_.cols = default_count;
  } else if (spec_.rows == 0) {
    need_count();
    spec_.rows = ceil_div(default_count, spec_.cols);
  } else if (spec_.cols == 0) {
    need_count();
    spec_.cols = ceil_div(default_count, spec_.rows);
  }
  validate(spec_);  // the element limit and the planted count against the resolved shape

  key_bulk_ = rng::stream_key(seed, Stream::bulk);
  key_select_ = rng::stream_key(seed, Stream::select);
  key_rows_ = rng::stream_key(seed, Stream::row_scales);

  if (spec_.kind == SourceKind::llm && spec_.outlier_count > 0) {
    // K distinct positions: draw index = floor(word * n / 2^64) from the
    // positions stream, skipping repeats (draw order fixes the result).
    const std::uint64_t n = size();
    const std::uint64_t key_pos = rng::stream_key(seed, Stream::planted_positions);
    const std::uint64_t key_val = rng::stream_key(seed, Stream::planted_values);
    std::unordered_set<std::uint64_t> used;
    used.reserve(static_cast<std::size_t>(2 * spec_.outlier_count));
    std::uint64_t draw = 0;
    for (std::uint64_t j = 0; j < spec_.outlier_count; ++j) {
      std::uint64_t index = 0;
      do {
        const unsigned __int128 w = rng::splitmix64(key_pos, draw++);
        index = static_cast<std::uint64_t>((w * n) >> 64);
      } while (!used.insert(index).second);
      const std::uint64_t w = rng::splitmix64(key_val, j);
      const double magnitude = spec_.size * (0.8 + 0.4 * rng::uniform_open01(w));  // low 52 bits
      planted_.push_back({index, (w >> 63) ? -magnitude : magnitude});            // sign: bit 63
    }
    std::sort(planted_.begin(), planted_.end(), [](auto& a, auto& b) { return a.index < b.index; });
  }
}

double SyntheticSource::row_scale(std::uint64_t row) const {
  if (row >= rows())
    throw usage_error(fmt::format("row {} is outside the {} rows", row, rows()), "synthetic source");
  if (spec_.kind != SourceKind::channel_scaled && spec_.kind != SourceKind::llm) return 1.0;
  const double z = rng::gauss(rng::splitmix64(key_rows_, row));
  const double l = spec_.spread;
  return spec_.kind == SourceKind::channel_scaled ? rng::detail::exp_bounded(l * z)
                                                  : rng::detail::exp_bounded(l * z - l * l);
}

template <class T>
void SyntheticSource::fill_impl(std::uint64_t first, std::span<T> out) const {
  const std::uint64_t n_total = size();
  if (first > n_total || out.size() > n_total - first)
    throw usage_error(fmt::format("elements [{}, {}) are outside the {} elements of '{}'", first,
                                  first + out.size(), n_total, canonical(spec_)),
                      "synthetic source", "fill within size()");
  if (out.empty()) return;
  KernelArgs a;
  a.key = key_bulk_;
  T* const data = out.data();
  const std::size_t n = out.size();
  switch (spec_.kind) {
    case SourceKind::gauss: kernel_gauss(a, first, data, n); return;
    case SourceKind::laplace: kernel_laplace(a, first, data, n); return;
    case SourceKind::uniform: kernel_uniform(a, first, data, n); return;
    case SourceKind::logistic: kernel_logistic(a, first, data, n); return;
    case SourceKind::student_t:
      a.nu = spec_.nu;
      a.two_over_nu = 2.0 / spec_.nu;
      if (spec_.unit_variance) a.mult = std::sqrt((spec_.nu - 2.0) / spec_.nu);
      kernel_student_t(a, first, data, n);
      return;
    case SourceKind::outliers: {
      a.key2 = key_select_;
      a.size = spec_.size;
      // fraction F -> threshold floor(F 2^53) on 53 bits (F = 1: every element).
      a.threshold = static_cast<std::int64_t>(std::floor(spec_.fraction * 0x1p53));
      kernel_outliers(a, first, data, n);
      return;
    }
    case SourceKind::channel_scaled:
    case SourceKind::llm: {
      const bool t_bulk = spec_.kind == SourceKind::llm && spec_.nu != 0;
      double t_factor = 1.0;
      if (t_bulk) {
        a.nu = spec_.nu;
        a.two_over_nu = 2.0 / spec_.nu;
        t_factor = std::sqrt((spec_.nu - 2.0) / spec_.nu);
      }
      // One kernel call per row segment, with the row's scale.
      std::uint64_t pos = first;
      const std::uint64_t end = first + n;
      while (pos < end) {
        const std::uint64_t row = pos / cols();
        const std::uint64_t seg_end = std::min(end, (row + 1) * cols());
        a.mult = row_scale(row) * t_factor;
        T* seg = data + (pos - first);
        const std::size_t seg_n = static_cast<std::size_t>(seg_end - pos);
        if (t_bulk) kernel_student_t(a, pos, seg, seg_n);
        else kernel_gauss(a, pos, seg, seg_n);
        pos = seg_end;
      }
      auto it = std::lower_bound(planted_.begin(), planted_.end(), first,
                                 [](const PlantedOutlier& p, std::uint64_t i) { return p.index < i; });
      for (; it != planted_.end() && it->index < end; ++it) data[it->index - first] = static_cast<T>(it->value);
      return;
    }
  }
}

void SyntheticSource::fill(std::uint64_t first, std::span<float> out) const { fill_impl(first, out); }
void SyntheticSource::fill(std::uint64_t first, std::span<double> out) const { fill_impl(first, out); }

std::vector<float> SyntheticSource::values(std::uint64_t first, std::size_t count) const {
  std::vector<float> v(count);
  fill(first, std::span<float>(v));
  return v;
}

std::string SyntheticSource::describe() const {
  std::string model;
  const SourceSpec& s = spec_;
  switch (s.kind) {
    case SourceKind::gauss: model = "normal N(0, 1)"; break;
    case SourceKind::laplace: model = "Laplace, scale 1/sqrt(2) (unit variance)"; break;
    case SourceKind::uniform: model = "uniform on (-sqrt(3), sqrt(3)) (unit variance)"; break;
    case SourceKind::logistic: model = "logistic, scale sqrt(3)/pi (unit variance)"; break;
    case SourceKind::student_t:
      model = fmt::format("Student t, nu = {}{}", s.nu, s.unit_variance ? ", scaled to unit variance" : "");
      break;
    case SourceKind::outliers:
      model = fmt::format("N(0, 1), each element +-{} with probability {}", s.size, s.fraction);
      break;
    case SourceKind::channel_scaled:
      model = fmt::format("row r ~ N(0, s_r^2), s_r = exp({} z_r), z_r ~ N(0, 1)", s.spread);
      break;
    case SourceKind::llm:
      model = fmt::format("weight-like matrix: row scales exp({} z_r - {}), {} bulk of RMS 1, {} planted outliers of "
                          "+-[{}, {}]",
                          s.spread, s.spread * s.spread,
                          s.nu != 0 ? fmt::format("unit-variance Student t (nu = {})", s.nu) : std::string("Gaussian"),
                          s.outlier_count, 0.8 * s.size, 1.2 * s.size);
      break;
  }
  return fmt::format("{}: {}; {} x {}, seed {} (SplitMix64 counter streams)", canonical(s), model, rows(), cols(), seed_);
}

std::optional<double> SyntheticSource::variance() const {
  const SourceSpec& s = spec_;
  switch (s.kind) {
    case SourceKind::gauss:
    case SourceKind::laplace:
    case SourceKind::uniform:
    case SourceKind::logistic: return 1.0;
    case SourceKind::student_t:
      if (s.unit_variance) return 1.0;
      if (s.nu > 2) return s.nu / (s.nu - 2);
      if (s.nu > 1) return std::numeric_limits<double>::infinity();
      return std::nullopt;
    case SourceKind::outliers: return (1 - s.fraction) + s.fraction * s.size * s.size;
    case SourceKind::channel_scaled: return std::exp(2 * s.spread * s.spread);
    case SourceKind::llm: {
      const double n = static_cast<double>(size());
      double planted_sq = 0;
      for (const auto& p : planted_) planted_sq += p.value * p.value;
      return ((n - static_cast<double>(planted_.size())) + planted_sq) / n;
    }
  }
  return std::nullopt;
}

std::optional<double> SyntheticSource::cdf(double x) const {
  if (std::isnan(x)) throw usage_error("the CDF of NaN is undefined", "synthetic source");
  const SourceSpec& s = spec_;
  if (s.kind == SourceKind::channel_scaled || s.kind == SourceKind::llm) return std::nullopt;
  if (std::isinf(x)) return x > 0 ? 1.0 : 0.0;
  switch (s.kind) {
    case SourceKind::gauss: return boost::math::cdf(boost::math::normal_distribution<double>(0, 1), x);
    case SourceKind::laplace:
      return boost::math::cdf(boost::math::laplace_distribution<double>(0, std::sqrt(0.5)), x);
    case SourceKind::uniform: {
      const double a = std::sqrt(3.0);
      if (x <= -a) return 0.0;
      if (x >= a) return 1.0;
      return boost::math::cdf(boost::math::uniform_distribution<double>(-a, a), x);
    }
    case SourceKind::logistic:
      return boost::math::cdf(boost::math::logistic_distribution<double>(0, std::sqrt(3.0) / boost::math::constants::pi<double>()), x);
    case SourceKind::student_t: {
      const double c = s.unit_variance ? std::sqrt((s.nu - 2) / s.nu) : 1.0;
      return boost::math::cdf(boost::math::students_t_distribution<double>(s.nu), x / c);
    }
    case SourceKind::outliers: {
      const double f = s.fraction;
      double p = (1 - f) * boost::math::cdf(boost::math::normal_distribution<double>(0, 1), x);
      if (x >= -s.size) p += f / 2;
      if (x >= s.size) p += f / 2;
      return p;
    }
    default: return std::nullopt;
  }
}

}  // namespace lobit
