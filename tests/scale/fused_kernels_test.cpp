// The vector kernels of the fused scoring loop against the general per-group
// path (quantize + accumulate) and against NearestTable::encode element by
// element: integer counts, codes and maxima exact, floating sums to 1e-12
// relative (they are summed in lanes), one thread and two bit for bit.
#include <doctest/doctest.h>

#include <algorithm>
#include <bit>
#include <cmath>
#include <limits>
#include <random>
#include <string>
#include <vector>

#include "lobit/error.hpp"
#include "lobit/format/value_table.hpp"
#include "lobit/measure/fused_kernels.hpp"
#include "lobit/measure/metrics.hpp"
#include "lobit/measure/score.hpp"
#include "lobit/scale/quantize.hpp"
#include "lobit/scale/scaled_format.hpp"

using namespace lobit;

namespace {

bool close(double u, double v) {
  return u == v || std::fabs(u - v) <= 1e-12 * std::max(std::fabs(u), std::fabs(v));
}

struct Run {
  ErrorSums s;
  std::vector<std::uint64_t> hist;
};

Run accumulate(const ScaledFormat& f, const std::vector<float>& x, std::uint64_t rows, std::uint64_t cols, bool fused,
               double top) {
  PlanBuilder pb(f, rows, cols, 1);
  pb.add_rows(0, rows, x.data());
  const TensorPlan plan = pb.finish();
  ErrorAccumulator acc(f, top);
  if (fused && acc.fused_ok())
    scan_rows(f, plan, 0, rows, x.data(), [&](const GroupView& g) { acc.add_fused(g); });
  else
    quantize_rows(f, plan, 0, rows, x.data(), [&](const GroupView& g) { acc.add(g); });
  return {acc.sums(), acc.histogram()};
}

void check_same(const Run& a, const Run& b) {
  const ErrorSums &p = a.s, &q = b.s;
  CHECK(p.n == q.n);
  CHECK(p.nonzero == q.nonzero);
  CHECK(p.clipped == q.clipped);
  CHECK(p.zeroed == q.zeroed);
  CHECK(p.nonfinite == q.nonfinite);
  CHECK(p.nan_outputs == q.nan_outputs);
  CHECK(p.top_n == q.top_n);
  CHECK(p.units == q.units);
  CHECK(p.groups == q.groups);
  CHECK(p.saturated_groups == q.saturated_groups);
  CHECK(p.underflow_groups == q.underflow_groups);
  CHECK(p.nan_groups == q.nan_groups);
  CHECK(p.max_abs_err == q.max_abs_err);
  CHECK(p.max_abs_x == q.max_abs_x);
  CHECK(close(p.sum_x, q.sum_x));
  CHECK(close(p.sum_x2, q.sum_x2));
  CHECK(close(p.sum_err2, q.sum_err2));
  CHECK(close(p.sum_rel, q.sum_rel));
  CHECK(close(p.top_err2, q.top_err2));
  CHECK(close(p.u_e, q.u_e));
  CHECK(close(p.u_e2, q.u_e2));
  CHECK(close(p.u_en, q.u_en));
  CHECK(p.u_n == q.u_n);
  CHECK(p.u_n2 == q.u_n2);
  CHECK(a.hist == b.hist);
}

const char* const kFormats[] = {
    "e2m1@32:e8m0",  "int4@32:fp16",  "nf4@64:fp16",          "int4@32:e8m0",     "nf4@32:e8m0",
    "e2m1@7:fp16",   "e2m1@row:fp32", "e2m1@16:e4m3,tensor-scale=fp32", "uint4@64:fp16,zero=uint4",
    "int4@tensor:fp32", "int4@col:bf16", "e3m2,scale=0.25", "nf4@64:fp32,scales=e4m3@256:fp32",
    "e2m1@32:e8m0,rule=absmax", "int4@32:fp16,rule=noclip", "int4@32:fp16,rule=mse", "e4m3@32:e8m0",
    // 17 to 256 values: the wide kernel
    "e5m2@32:e8m0", "int8@32:fp16", "int8-frac6@32:e8m0", "e2m3@32:e8m0", "e3m2@row:fp32", "uint8@64:fp16",
    "e4m3-single-nan@16:fp32", "int5@32:bf16,rule=mse", "e4m3@tensor:fp32"};

std::vector<float> source(const std::string& kind, std::size_t n, unsigned seed) {
  std::vector<float> x(n);
  std::mt19937 rng(seed);
  std::normal_distribution<float> nd;
  std::student_t_distribution<float> td(2.5f);
  std::uniform_int_distribution<int> pick(0, 99);
  for (std::size_t i = 0; i < n; ++i) {
    if (kind == "gauss") x[i] = nd(rng);
    if (kind == "student") x[i] = td(rng);
    if (kind == "special") {
      const int k = pick(rng);
      const float v = nd(rng);
      if (k < 10) x[i] = (k & 1) ? 0.0f : -0.0f;
      else if (k < 15) x[i] = v * 1e-42f;  // subnormal float32
      else if (k < 18) x[i] = v * 3e38f;   // huge
      else if (k < 20) x[i] = std::numeric_limits<float>::denorm_min() * static_cast<float>(k - 17);
      else if (k < 22) x[i] = std::nextafter(std::numeric_limits<float>::max(), 0.0f) * ((k & 1) ? 1.0f : -1.0f);
      else x[i] = v * std::ldexp(1.0f, (k % 40) - 20);
    }
  }
  if (kind == "special") {
    x[5] = NAN;
    x[n / 2] = INFINITY;
    x[n - 3] = -INFINITY;
    for (std::size_t i = n / 8; i < n / 4; ++i) x[i] = 0.0f;      // an all-zero stretch
    for (std::size_t i = n / 4; i < n / 3; ++i) x[i] = 1e-44f;    // tiny: the mx scale bottoms out
  }
  return x;
}

// Inputs at every value and threshold of a table and both float32 neighbours of each,
// also 3x (for the scale 3), signed zeros, tiny and huge values.
std::vector<float> boundary_inputs(const ValueTable& vt) {
  std::vector<float> xs = {0.0f, -0.0f, 1e-45f, -1e-45f, 1e-30f, -1e-30f, 3e38f, -3e38f, 1e6f, -1e6f};
  auto add = [&](double v) {
    const float fv = static_cast<float>(v);
    for (float u : {fv, std::nextafter(fv, -INFINITY), std::nextafter(fv, INFINITY)}) xs.push_back(u);
  };
  for (double v : vt.values()) add(v), add(3 * v);
  for (const auto& t : vt.thresholds()) add(t.nearest), add(3 * t.nearest);
  return xs;
}

}  // namespace

TEST_CASE("fused kernels: the same sums, counts and codes as quantize + accumulate") {
  INFO("vector kernels available: " << fused::have_avx512());
  // Where the CPU has them, the formats of up to 16 values take the kernels.
  CHECK(ErrorAccumulator(*parse_scaled("e2m1@32:e8m0"), 1.0).vector_kernels() == fused::have_avx512());
  CHECK(ErrorAccumulator(*parse_scaled("nf4@64:fp16"), 1.0).vector_kernels() == fused::have_avx512());
  CHECK(ErrorAccumulator(*parse_scaled("e4m3@32:e8m0"), 1.0).vector_kernels() == fused::have_avx512());
  CHECK(ErrorAccumulator(*parse_scaled("int8@32:fp16"), 1.0).vector_kernels() == fused::have_avx512());
  CHECK(!ErrorAccumulator(*parse_scaled("fp16@32:fp32"), 1.0).vector_kernels());  // 65536 values: scalar
  for (const char* kind : {"gauss", "student", "special"}) {
    for (const auto& [rows, cols] : {std::pair<std::uint64_t, std::uint64_t>{24, 256}, {17, 100}, {5, 37}}) {
      const std::vector<float> x = source(kind, rows * cols, 11);
      for (const char* spec : kFormats) {
        INFO(kind << " " << rows << "x" << cols << " " << spec);
        const auto f = parse_scaled(spec);
        for (double top : {0.0, 1.5, std::numeric_limits<double>::infinity()})
          check_same(accumulate(*f, x, rows, cols, true, top), accumulate(*f, x, rows, cols, false, top));
      }
    }
  }
}

TEST_CASE("fused kernels: score() fused against unfused, one thread against two") {
  for (const char* kind : {"gauss", "student", "special"}) {
    const std::uint64_t rows = 64, cols = 96;  // 96 = 3 blocks of 32 and a ragged one of 64
    const std::vector<float> x = source(kind, rows * cols, 3);
    const MemorySource src(x, rows, cols);
    std::vector<std::shared_ptr<const ScaledFormat>> fs;
    for (const char* spec : kFormats) fs.push_back(parse_scaled(spec));
    ScoreOptions one, two, gen;
    one.chunk_elements = two.chunk_elements = gen.chunk_elements = 500;
    one.threads = 1;
    two.threads = 2;
    gen.threads = 1;
    gen.unfused = true;
    const ScoreResult r1 = score(fs, src, one), r2 = score(fs, src, two), rg = score(fs, src, gen);
    for (std::size_t i = 0; i < fs.size(); ++i) {
      INFO(kind << " " << fs[i]->text);
      const ErrorReport &a = r1.rows[i].report, &b = r2.rows[i].report, &g = rg.rows[i].report;
      // One thread and two: bit for bit.
      CHECK(a.mse == b.mse);
      CHECK(a.mse_stderr == b.mse_stderr);
      CHECK(a.mean_rel_err == b.mean_rel_err);
      CHECK(a.top_mse == b.top_mse);
      CHECK(a.entropy_bits == b.entropy_bits);
      CHECK(a.max_abs_err == b.max_abs_err);
      CHECK(a.clip_rate == b.clip_rate);
      CHECK(a.sqnr_db == b.sqnr_db);
      // Fused against the general path.
      CHECK(close(a.mse, g.mse));
      CHECK(close(a.mse_stderr, g.mse_stderr));
      CHECK(close(a.mean_rel_err, g.mean_rel_err));
      CHECK(close(a.top_mse, g.top_mse));
      CHECK(a.max_abs_err == g.max_abs_err);
      CHECK(a.max_err_rel_absmax == g.max_err_rel_absmax);
      CHECK(a.clip_rate == g.clip_rate);
      CHECK(a.zero_rate == g.zero_rate);
      CHECK(a.n == g.n);
      CHECK(a.top_n == g.top_n);
      CHECK(a.codes_used == g.codes_used);
      CHECK(a.entropy_bits == g.entropy_bits);
      CHECK(a.groups == g.groups);
      CHECK(a.saturated_groups == g.saturated_groups);
      CHECK(a.underflow_groups == g.underflow_groups);
      CHECK(a.nan_groups == g.nan_groups);
      CHECK(a.nonfinite == g.nonfinite);
    }
  }
}

TEST_CASE("fused kernels: element codes equal NearestTable::encode, ties and signed zeros included") {
  if (!fused::have_avx512()) return;  // nothing to compare on this CPU: the scalar loop runs
  for (const char* spec : {"e2m1", "int4", "nf4", "uint4", "e3m0", "int3", "e2m1+bias=0"}) {
    std::shared_ptr<const ScaledFormat> f;
    try {
      f = parse_scaled(std::string(spec) + "@32:fp32");
    } catch (const std::exception&) {
      continue;  // a spec this build does not know
    }
    INFO(spec);
    REQUIRE(f->element_table);
    const NearestTable& nt = *f->element_table;
    const fused::KernelTable kt = fused::make_kernel_table(*f->code_element);
    if (!kt.ok) continue;
    const ValueTable vt(*f->code_element);
    // Inputs: every value, every threshold and both float32 neighbours of each, signed
    // zeros, tiny and huge values; scales 1 (power of two: y = x * 1) and 3 (y = x / 3).
    const std::vector<float> xs = boundary_inputs(vt);
    std::vector<std::uint64_t> hist(std::size_t{1} << f->code_element->bits(), 0);
    for (double s : {1.0, 3.0, 0.5}) {
      const bool pow2 = s != 3.0;
      for (float x : xs) {
        const double y = pow2 ? x * (1.0 / s) : x / s;
        INFO("x = " << x << ", s = " << s);
        const Code want = nt.encode(y);
        fused::HistState hs;
        fused::GroupSums r;
        fused::LaneSums lanes;
        fused::group_avx512(kt, &x, 1, s, 1.0 / s, pow2, -INFINITY, INFINITY, INFINITY, r, lanes, &hs);
        std::fill(hist.begin(), hist.end(), 0);
        fused::flush_histogram(hs, kt, hist.data());
        CHECK(hist[want] == 1);
        // The kernel's error term equals the scalar one.
        const double q = s * nt.decode(want);
        CHECK(r.err2 == (q - x) * (q - x));
        double sx = 0, sx2 = 0, srel = 0, te2 = 0, mae = 0, max_x = 0;
        std::uint64_t nonzero = 0, zeroed = 0, top_n = 0, clipped = 0;
        fused::flush_lanes(lanes, sx, sx2, srel, te2, mae, max_x, nonzero, zeroed, top_n, clipped);
        CHECK(zeroed == (x != 0 && q == 0 ? 1u : 0u));
        CHECK(nonzero == (x != 0 ? 1u : 0u));
        CHECK(mae == std::fabs(q - x));
        CHECK(srel == (x != 0 ? std::fabs(q - x) / std::fabs(x) : 0.0));
      }
    }
  }
}

TEST_CASE("fused kernels: the wide kernel's codes equal NearestTable::encode, ties and signed zeros included") {
  if (!fused::have_avx512()) return;  // nothing to compare on this CPU: the scalar loop runs
  int tables = 0;
  for (const char* spec : {"e4m3", "e5m2", "int8", "uint8", "int8-frac6", "e2m3", "e3m2", "e4m3-single-nan",
                           "e5m2-single-nan", "int5", "int6", "int7", "e3m4+subnormals=no", "e4m3+bias=3"}) {
    const auto f = parse_scaled(std::string(spec) + "@32:fp32");
    INFO(spec);
    REQUIRE(f->element_table);
    const NearestTable& nt = *f->element_table;
    const fused::WideKernelTable kt = fused::make_wide_kernel_table(*f->code_element);
    if (!kt.ok) continue;
    ++tables;
    const ValueTable vt(*f->code_element);
    const std::vector<float> xs = boundary_inputs(vt);
    std::vector<std::uint64_t> hist(std::size_t{1} << f->code_element->bits(), 0);
    int bad = 0;
    for (double s : {1.0, 3.0, 0.5}) {
      const bool pow2 = s != 3.0;
      // All inputs in one call (groups of any length, masked tails), then one at a time.
      for (std::size_t len : {xs.size(), std::size_t{1}}) {
        for (std::size_t at = 0; at < xs.size(); at += len) {
          const std::size_t n = std::min(len, xs.size() - at);
          fused::WideHist hs;
          fused::GroupSums r;
          fused::LaneSums lanes;
          fused::group_avx512_wide(kt, xs.data() + at, n, s, 1.0 / s, pow2, -INFINITY, INFINITY, INFINITY, r, lanes,
                                   &hs);
          std::fill(hist.begin(), hist.end(), 0);
          fused::flush_wide_histogram(hs, kt, hist.data());
          std::vector<std::uint64_t> want(hist.size(), 0);
          double err2 = 0;
          for (std::size_t i = at; i < at + n; ++i) {
            const double y = pow2 ? xs[i] * (1.0 / s) : xs[i] / s;
            const Code c = nt.encode(y);
            ++want[c];
            const double q = s * nt.decode(c);
            err2 += (q - xs[i]) * (q - xs[i]);
          }
          bad += hist != want;
          if (n == 1) bad += r.err2 != err2;
        }
      }
    }
    CHECK(bad == 0);
  }
  CHECK(tables >= 10);
}

TEST_CASE("fused kernels: the vector group summary equals the scalar loop") {
  // The reference: summarize's plain loop.
  const auto reference = summarize_scalar;
  for (const char* kind : {"gauss", "student", "special"}) {
    const std::vector<float> x = source(kind, 4096, 7);
    for (std::size_t n : {1, 2, 7, 8, 15, 16, 17, 31, 32, 33, 64, 100}) {
      for (std::size_t start = 0; start + n <= x.size(); start += n + 3) {
        INFO(kind << " n " << n << " start " << start);
        const GroupSummary a = summarize(x.data() + start, n, 1), b = reference(x.data() + start, n, 1);
        CHECK(a.nonfinite == b.nonfinite);
        CHECK(a.amax == b.amax);
        CHECK(a.min == b.min);
        CHECK(a.max == b.max);
        CHECK(std::signbit(a.min) == std::signbit(b.min));
        CHECK(std::signbit(a.max) == std::signbit(b.max));
        double amax = -1;
        if (fused::amax_avx512(x.data() + start, n, amax)) {
          CHECK(b.nonfinite == 0);
          CHECK(amax == b.amax);
        } else {
          CHECK((!fused::have_avx512() || b.nonfinite > 0));
        }
      }
    }
  }
}

TEST_CASE("score: the top-magnitude threshold of the pruned pre-pass equals the full histogram's") {
  // The reference: every finite input in a bin of the top 16 bits of |x|, the lower
  // edge of the bin where the top ceil(fraction * finite) inputs begin.
  auto reference = [](const std::vector<float>& x, double fraction) {
    std::vector<std::uint64_t> bins(1 << 15, 0);
    std::uint64_t finite = 0;
    for (float v : x) {
      if (!std::isfinite(v)) continue;
      ++finite;
      ++bins[std::bit_cast<std::uint32_t>(std::fabs(v)) >> 16];
    }
    const auto count = std::max<std::uint64_t>(
        static_cast<std::uint64_t>(std::ceil(fraction * static_cast<double>(finite))), 1);
    std::uint64_t acc = 0;
    for (std::size_t b = bins.size(); b-- > 0;) {
      acc += bins[b];
      if (acc >= count) return static_cast<double>(std::bit_cast<float>(static_cast<std::uint32_t>(b << 16)));
    }
    return 0.0;
  };
  const auto f = parse_scaled("e2m1@32:e8m0");
  for (const char* kind : {"gauss", "student", "special"}) {
    std::vector<float> x = source(kind, 256 * 512, 9);
    if (std::string(kind) == "gauss") {
      // The largest values arrive last: an early floor must not cut them off.
      std::sort(x.begin(), x.end(), [](float a, float b) { return std::fabs(a) < std::fabs(b); });
    }
    const MemorySource src(x, 256, 512);
    for (double fraction : {0.0, 1e-4, 1e-2, 0.3, 1.0}) {
      for (int threads : {1, 2}) {
        INFO(kind << " fraction " << fraction << " threads " << threads);
        ScoreOptions o;
        o.threads = threads;
        o.chunk_elements = 4096;
        o.top_fraction = fraction;
        const ScoreResult r = score({f}, src, o);
        CHECK(r.top_threshold == reference(x, fraction));
        CHECK(r.rows[0].report.top_n >= 1);
      }
    }
  }
}

namespace {
// A source whose reads fail past a row (a file that turns out corrupt mid-way).
class FailingSource final : public TensorSource {
 public:
  std::uint64_t rows() const override { return 4096; }
  std::uint64_t cols() const override { return 256; }
  std::string name() const override { return "failing"; }
  void fill_rows(std::uint64_t row0, std::uint64_t nrows, float* out) const override {
    if (row0 + nrows > 1000) throw usage_error("a read failed", "failing source");
    for (std::uint64_t i = 0; i < nrows * cols(); ++i) out[i] = static_cast<float>(i % 7) - 3.0f;
  }
};
}  // namespace

TEST_CASE("score(): a source that fails on any thread gives its error back, in every pass") {
  const FailingSource src;
  for (const char* spec : {"e2m1@32:e8m0", "int4@tensor:fp32"}) {  // threaded pre-pass; plan pre-pass
    for (int threads : {1, 2}) {
      INFO(spec << " threads " << threads);
      ScoreOptions o;
      o.threads = threads;
      o.chunk_elements = 256 * 64;
      CHECK_THROWS_WITH_AS(score({parse_scaled(spec)}, src, o), doctest::Contains("a read failed"), Error);
    }
  }
}
