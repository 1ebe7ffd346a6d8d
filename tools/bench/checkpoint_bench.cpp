// Reading + scoring throughput on a checkpoint file: a synthetic bf16 safetensors file
// (1 GiB by default; LOBIT_BENCH_CHECKPOINT_MB sets the size) written by the benchmark
// itself, then several formats scored in one pass per tensor straight from the file.
// Reports elements per second and the peak resident memory (which includes mapped
// pages; lobit reads with pread into small buffers, so it stays far below the file size).
#include <benchmark/benchmark.h>
#include <sys/resource.h>
#include <unistd.h>

#include <cmath>
#include <cstring>
#include <span>
#include <cstdlib>
#include <filesystem>
#include <memory>
#include <string>
#include <vector>

#include "lobit/io/checkpoint.hpp"
#include "lobit/io/safetensors.hpp"
#include "lobit/io/tensor_view.hpp"
#include "lobit/measure/score.hpp"
#include "lobit/source/synthetic.hpp"

namespace {

std::string bench_file() {
  static const std::string path = [] {
    const char* mb_env = std::getenv("LOBIT_BENCH_CHECKPOINT_MB");
    const std::uint64_t mb = mb_env ? std::strtoull(mb_env, nullptr, 10) : 1024;
    const std::string p = (std::filesystem::temp_directory_path() /
                           ("lobit-bench-" + std::to_string(::getpid()) + ".safetensors")).string();
    // 16 tensors of [rows, 4096] bf16 Gaussian values with log-normal row scales.
    const std::uint64_t cols = 4096, tensors = 16;
    const std::uint64_t rows = std::max<std::uint64_t>(1, mb * (1 << 20) / 2 / cols / tensors);
    std::vector<lobit::io::PlannedTensor> plan;
    for (std::uint64_t t = 0; t < tensors; ++t)
      plan.push_back({"layers." + std::to_string(t) + ".weight", lobit::io::DType::bf16, {rows, cols}});
    lobit::io::SafetensorsWriter w(p, plan);
    const lobit::SyntheticSource src("gauss", 7, rows * cols * tensors);
    std::vector<float> buf(static_cast<std::size_t>(cols) * 256);
    std::vector<std::uint16_t> half(buf.size());
    for (std::uint64_t t = 0; t < tensors; ++t)
      for (std::uint64_t r = 0; r < rows; r += 256) {
        const std::uint64_t n = std::min<std::uint64_t>(256, rows - r);
        src.fill((t * rows + r) * cols, std::span<float>(buf.data(), n * cols));
        for (std::uint64_t k = 0; k < n; ++k) {
          const float scale = 0.02f * std::exp(0.5f * std::sin(static_cast<float>(r + k)));
          for (std::uint64_t c = 0; c < cols; ++c) {
            std::uint32_t b;
            const float v = buf[k * cols + c] * scale;
            std::memcpy(&b, &v, 4);
            half[k * cols + c] = static_cast<std::uint16_t>((b + 0x7fff + ((b >> 16) & 1)) >> 16);  // nearest-even
          }
        }
        w.write(half.data(), n * cols * 2);
      }
    w.commit();
    std::atexit([] {
      std::error_code ec;
      for (const auto& e : std::filesystem::directory_iterator(std::filesystem::temp_directory_path(), ec))
        if (e.path().filename().string().rfind("lobit-bench-" + std::to_string(::getpid()), 0) == 0)
          std::filesystem::remove(e.path(), ec);
    });
    return p;
  }();
  return path;
}

void score_checkpoint(benchmark::State& state, std::vector<std::string> specs) {
  const std::string path = bench_file();
  std::vector<std::shared_ptr<const lobit::ScaledFormat>> fs;
  for (const auto& s : specs) fs.push_back(lobit::parse_scaled(s));
  std::uint64_t elements = 0;
  for (auto _ : state) {
    const auto ckpt = lobit::io::open_checkpoint(path);
    for (std::size_t i = 0; i < ckpt->tensors().size(); ++i) {
      const auto& t = ckpt->tensors()[i];
      lobit::io::StoredTensorSource src(*ckpt, i, lobit::io::fold(t, {1}));
      lobit::ScoreOptions o;
      o.threads = static_cast<int>(state.range(0));
      const auto r = lobit::score(fs, src, o);
      benchmark::DoNotOptimize(r.rows[0].report.mse);
      elements += t.count();
    }
  }
  struct rusage ru{};
  getrusage(RUSAGE_SELF, &ru);
  state.counters["elements_per_s"] = benchmark::Counter(static_cast<double>(elements), benchmark::Counter::kIsRate);
  state.counters["formats"] = static_cast<double>(specs.size());
  state.counters["peak_rss_MB"] = static_cast<double>(ru.ru_maxrss) / 1024.0;
  state.counters["file_MB"] = static_cast<double>(std::filesystem::file_size(path)) / (1 << 20);
}

}  // namespace

BENCHMARK_CAPTURE(score_checkpoint, mx_int_three_formats,
                  std::vector<std::string>{"mxfp4", "mxfp8-e4m3", "int4@32:fp16"})
    ->Arg(1)->Arg(2)->Iterations(1)->Unit(benchmark::kSecond)->UseRealTime();
BENCHMARK_CAPTURE(score_checkpoint, mxfp4, std::vector<std::string>{"mxfp4"})
    ->Arg(1)->Arg(2)->Iterations(1)->Unit(benchmark::kSecond)->UseRealTime();
BENCHMARK_CAPTURE(score_checkpoint, mxfp8_e4m3, std::vector<std::string>{"mxfp8-e4m3"})
    ->Arg(1)->Iterations(1)->Unit(benchmark::kSecond)->UseRealTime();
BENCHMARK_CAPTURE(score_checkpoint, int4_fp16_scales, std::vector<std::string>{"int4@32:fp16"})
    ->Arg(1)->Iterations(1)->Unit(benchmark::kSecond)->UseRealTime();

BENCHMARK_MAIN();
