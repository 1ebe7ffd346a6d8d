// Sample generation throughput of the synthetic sources: SyntheticSource::fill
// into a float32 (and, for gauss, a float64) buffer of 16M elements, one thread.
//
//   lobit_source_bench [--benchmark_min_time=0.2] [--benchmark_filter=gauss]
//
// items_per_second is samples per second on one core. The aim: generation does
// not dominate scoring, which targets 500M elements/s per core for FP4 block
// scoring.
#include <benchmark/benchmark.h>

#include <cstdint>
#include <span>
#include <string>
#include <vector>

#include "lobit/source/synthetic.hpp"

namespace {

constexpr std::size_t element_count = std::size_t{1} << 24;  // 16M
constexpr std::uint64_t seed = 0x6c6f626974ull;               // "lobit"

template <class T>
void bench_fill(benchmark::State& state, const std::string& spec) {
  const lobit::SyntheticSource source(spec, seed, element_count);
  std::vector<T> buffer(element_count);
  for (auto _ : state) {
    source.fill(0, std::span<T>(buffer));
    benchmark::DoNotOptimize(buffer.data());
    benchmark::ClobberMemory();
  }
  state.SetItemsProcessed(static_cast<std::int64_t>(state.iterations()) * static_cast<std::int64_t>(element_count));
  state.SetLabel(source.describe().substr(0, source.describe().find(':')));
}

}  // namespace

int main(int argc, char** argv) {
  for (const std::string spec : {"gauss", "laplace", "uniform", "logistic", "student-t+nu=3", "outliers",
                                 "channel-scaled+cols=4096", "llm", "llm+nu=8"})
    benchmark::RegisterBenchmark(("f32/" + spec).c_str(), bench_fill<float>, spec)->Unit(benchmark::kMillisecond);
  benchmark::RegisterBenchmark("f64/gauss", bench_fill<double>, std::string("gauss"))->Unit(benchmark::kMillisecond);
  benchmark::Initialize(&argc, argv);
  if (benchmark::ReportUnrecognizedArguments(argc, argv)) return 1;
  benchmark::RunSpecifiedBenchmarks();
  benchmark::Shutdown();
  return 0;
}
