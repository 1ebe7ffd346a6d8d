// libFuzzer target for the ONNX reader: the input is written to a model file in a
// folder of its own (so external data can only name that file), opened, and every
// tensor read with read_f64 in chunks. lobit::Error is the expected outcome of bad
// input; anything else (a crash, a sanitizer report, another exception) is a bug.
#include <unistd.h>

#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <filesystem>
#include <string>
#include <vector>

#include "lobit/error.hpp"
#include "lobit/io/onnx.hpp"

namespace {

// The folder is removed when the fuzzer exits normally.
struct Folder {
  std::filesystem::path dir;
  Folder() : dir(std::filesystem::temp_directory_path() / ("lobit-onnx-fuzz-" + std::to_string(::getpid()))) {
    std::filesystem::create_directories(dir);
  }
  ~Folder() {
    std::error_code ec;
    std::filesystem::remove_all(dir, ec);
  }
};

const std::string& model_path() {
  static const Folder folder;
  static const std::string path = (folder.dir / "model.onnx").string();
  return path;
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  (void)lobit::io::looks_like_onnx(data, size < 64 ? size : 64);
  const std::string& path = model_path();
  if (FILE* f = std::fopen(path.c_str(), "wb")) {
    if (size > 0) std::fwrite(data, 1, size, f);
    std::fclose(f);
  } else {
    return 0;
  }
  try {
    const auto ckpt = lobit::io::open_onnx(path);
    std::vector<double> buf(4096);
    for (std::size_t i = 0; i < ckpt->tensors().size(); ++i) {
      const std::uint64_t n = ckpt->tensors()[i].count();
      for (std::uint64_t done = 0; done < n;) {
        const std::uint64_t k = n - done < buf.size() ? n - done : buf.size();
        ckpt->read_f64(i, done, k, buf.data());
        done += k;
      }
    }
  } catch (const lobit::Error&) {
    // Refused input: the expected outcome.
  }
  return 0;
}
