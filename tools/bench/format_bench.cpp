// Throughput of the bulk span API: lobit::encode from binary32 and
// lobit::decode to binary32, 16M elements per call, for a minifloat (e2m1,
// e4m3), an integer (int4) and a codebook (nf4).
//
//   lobit_bench [--benchmark_min_time=0.2] [--benchmark_filter=e4m3]
//
// Input: seeded normal samples (std::mt19937_64 + Box-Muller) scaled so that
// the format's largest finite magnitude sits at 3 standard deviations, so
// every binade and a little overflow is exercised, as with real tensors.
#include <benchmark/benchmark.h>

#include <cmath>
#include <cstdint>
#include <map>
#include <memory>
#include <numbers>
#include <random>
#include <span>
#include <string>
#include <vector>

#include "lobit/format/bulk.hpp"
#include "lobit/format/properties.hpp"
#include "lobit/format/spec.hpp"

namespace {

constexpr std::size_t element_count = std::size_t{1} << 24;  // 16M
constexpr std::uint64_t data_seed = 0x6c6f626974ull;          // "lobit"

struct BenchData {
  std::shared_ptr<const lobit::ElementFormat> format;
  std::vector<float> input;
  std::vector<lobit::Code> codes;
  std::vector<float> decoded;
};

std::vector<float> normal_samples(std::size_t n, double sigma, std::uint64_t seed) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  std::vector<float> v(n);
  for (std::size_t i = 0; i + 1 < n; i += 2) {
    const double u1 = 1.0 - unit(rng);  // (0, 1]
    const double u2 = unit(rng);
    const double r = std::sqrt(-2.0 * std::log(u1));
    v[i] = static_cast<float>(sigma * r * std::cos(2.0 * std::numbers::pi * u2));
    v[i + 1] = static_cast<float>(sigma * r * std::sin(2.0 * std::numbers::pi * u2));
  }
  return v;
}

// One data set per format, built on first use and shared by encode and decode.
BenchData& data_for(const std::string& spec) {
  static std::map<std::string, std::unique_ptr<BenchData>> cache;
  auto& slot = cache[spec];
  if (!slot) {
    slot = std::make_unique<BenchData>();
    slot->format = lobit::parse_element(spec);
    const double max = lobit::properties(*slot->format).max_finite;
    slot->input = normal_samples(element_count, max / 3.0, data_seed);
    slot->codes.resize(element_count);
    slot->decoded.resize(element_count);
    lobit::encode(*slot->format, std::span<const float>(slot->input), std::span<lobit::Code>(slot->codes), {});
  }
  return *slot;
}

void bench_encode(benchmark::State& state, const std::string& spec) {
  BenchData& d = data_for(spec);
  const lobit::EncodeOptions options{};  // nearest-even, the format's default overflow
  for (auto _ : state) {
    lobit::encode(*d.format, std::span<const float>(d.input), std::span<lobit::Code>(d.codes), options);
    benchmark::DoNotOptimize(d.codes.data());
    benchmark::ClobberMemory();
  }
  state.SetItemsProcessed(static_cast<std::int64_t>(state.iterations()) * static_cast<std::int64_t>(element_count));
}

void bench_decode(benchmark::State& state, const std::string& spec) {
  BenchData& d = data_for(spec);
  for (auto _ : state) {
    lobit::decode(*d.format, std::span<const lobit::Code>(d.codes), std::span<float>(d.decoded));
    benchmark::DoNotOptimize(d.decoded.data());
    benchmark::ClobberMemory();
  }
  state.SetItemsProcessed(static_cast<std::int64_t>(state.iterations()) * static_cast<std::int64_t>(element_count));
}

}  // namespace

int main(int argc, char** argv) {
  for (const std::string spec : {"e2m1", "e4m3", "int4", "nf4"}) {
    benchmark::RegisterBenchmark(("encode/" + spec).c_str(), bench_encode, spec)->Unit(benchmark::kMillisecond);
    benchmark::RegisterBenchmark(("decode/" + spec).c_str(), bench_decode, spec)->Unit(benchmark::kMillisecond);
  }
  benchmark::Initialize(&argc, argv);
  if (benchmark::ReportUnrecognizedArguments(argc, argv)) return 1;
  benchmark::RunSpecifiedBenchmarks();
  benchmark::Shutdown();
  return 0;
}
