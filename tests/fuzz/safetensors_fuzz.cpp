// libFuzzer target: arbitrary bytes as a .safetensors file. Opening and reading every tensor
// must either succeed or throw lobit::Error; anything else (a crash, a sanitizer report,
// another exception) is a bug.
#include <stdlib.h>
#include <unistd.h>

#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <string>
#include <vector>

#include "lobit/error.hpp"
#include "lobit/io/safetensors.hpp"

namespace {

// One private folder per process, so that nothing else is found beside the input (a
// sharded index names its shards relative to its own folder); removed at exit.
struct InputFile {
  std::string dir, path;
  InputFile() {
    char d[] = "/tmp/lobit-fuzz-XXXXXX";
    if (!::mkdtemp(d)) abort();
    dir = d;
    path = dir + "/input.safetensors";
  }
  ~InputFile() {
    ::unlink(path.c_str());
    ::rmdir(dir.c_str());
  }
};
const std::string& input_path() {
  static const InputFile f;
  return f.path;
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  const std::string& path = input_path();
  {
    FILE* f = std::fopen(path.c_str(), "wb");
    if (!f) abort();
    if (size > 0 && std::fwrite(data, 1, size, f) != size) abort();
    std::fclose(f);
  }
  try {
    const auto ck = lobit::io::open_safetensors(path);
    std::vector<double> buf(4096);
    for (std::size_t i = 0; i < ck->tensors().size(); ++i) {
      const std::uint64_t n = ck->tensors()[i].count();
      for (std::uint64_t first = 0; first < n; first += buf.size()) {
        const std::uint64_t k = n - first < buf.size() ? n - first : buf.size();
        ck->read_f64(i, first, k, buf.data());
      }
    }
  } catch (const lobit::Error&) {
    // Expected for malformed input.
  }
  return 0;
}
