// Scoring throughput: elements per second for block-scaled formats on 16M
// Gaussian samples already in memory, one thread and all threads.
#include <benchmark/benchmark.h>

#include <random>
#include <vector>

#include "lobit/measure/score.hpp"
#include "lobit/scale/scaled_format.hpp"

namespace {
const std::vector<float>& samples() {
  static const std::vector<float> data = [] {
    std::vector<float> v(std::size_t{1} << 24);
    std::mt19937_64 rng(1);
    std::normal_distribution<float> nd;
    for (auto& x : v) x = nd(rng);
    return v;
  }();
  return data;
}

void score_one(benchmark::State& state, const char* spec) {
  const auto& x = samples();
  const lobit::MemorySource src(x, x.size() / 4096, 4096);
  const std::vector<std::shared_ptr<const lobit::ScaledFormat>> fs = {lobit::parse_scaled(spec)};
  lobit::ScoreOptions o;
  o.threads = static_cast<int>(state.range(0));
  for (auto _ : state) {
    auto r = lobit::score(fs, src, o);
    benchmark::DoNotOptimize(r.rows[0].report.mse);
  }
  state.SetItemsProcessed(static_cast<std::int64_t>(state.iterations()) * static_cast<std::int64_t>(x.size()));
  state.SetLabel(std::string(spec) + ", threads " + std::to_string(state.range(0)));
}
}  // namespace

BENCHMARK_CAPTURE(score_one, mxfp4, "e2m1@32:e8m0")->Arg(1)->Arg(2)->Unit(benchmark::kMillisecond)->UseRealTime();
BENCHMARK_CAPTURE(score_one, int4_fp16, "int4@32:fp16")->Arg(1)->Arg(2)->Unit(benchmark::kMillisecond)->UseRealTime();
BENCHMARK_CAPTURE(score_one, nf4_fp16, "nf4@64:fp16")->Arg(1)->Arg(2)->Unit(benchmark::kMillisecond)->UseRealTime();
BENCHMARK_CAPTURE(score_one, mxfp8_e4m3, "e4m3@32:e8m0")->Arg(1)->Arg(2)->Unit(benchmark::kMillisecond)->UseRealTime();
BENCHMARK_CAPTURE(score_one, mxint8, "mxint8")->Arg(1)->Arg(2)->Unit(benchmark::kMillisecond)->UseRealTime();
BENCHMARK_MAIN();
