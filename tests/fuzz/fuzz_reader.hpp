#pragma once
// The body every reader's libFuzzer target shares: the input bytes become a file of the
// given name in a private folder (so that nothing else is found beside it: a sharded
// index names its shards, an ONNX model its external data, relative to that folder),
// the reader opens it and every tensor is read in chunks with read_f64. lobit::Error is
// the expected outcome of bad input; anything else (a crash, a sanitizer report,
// another exception) is a bug. The folder is removed when the fuzzer exits.
#include <stdlib.h>
#include <unistd.h>

#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <string>
#include <vector>

#include "lobit/error.hpp"
#include "lobit/io/checkpoint.hpp"

namespace lobit::fuzz {

class InputFile {
 public:
  explicit InputFile(const std::string& name) {
    char d[] = "/tmp/lobit-fuzz-XXXXXX";
    if (!::mkdtemp(d)) abort();
    dir_ = d;
    path_ = dir_ + "/" + name;
  }
  ~InputFile() {
    ::unlink(path_.c_str());
    ::rmdir(dir_.c_str());
  }
  const std::string& path() const { return path_; }

 private:
  std::string dir_, path_;
};

template <class Open>
int read_everything(const InputFile& file, const std::uint8_t* data, std::size_t size, Open open) {
  const std::string& path = file.path();
  FILE* f = std::fopen(path.c_str(), "wb");
  if (!f) abort();
  if (size > 0 && std::fwrite(data, 1, size, f) != size) abort();
  std::fclose(f);
  try {
    const auto ck = open(path);
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

}  // namespace lobit::fuzz
