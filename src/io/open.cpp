// Opening a checkpoint by its content, falling back to the extension.
#include <fmt/format.h>

#include <algorithm>
#include <filesystem>

#include "lobit/error.hpp"
#include "lobit/io/checkpoint.hpp"
#include "lobit/io/numpy.hpp"
#include "lobit/io/onnx.hpp"
#include "lobit/io/safetensors.hpp"

namespace lobit::io {

std::unique_ptr<Checkpoint> open_checkpoint(const std::string& path) {
  namespace fs = std::filesystem;
  std::error_code ec;
  if (fs::is_directory(path, ec))
    throw usage_error("is a folder", path,
                      "give a checkpoint file (.safetensors, a sharded index .json, .npy, .npz or .onnx)");
  RandomAccessFile f(path);  // reports a missing or unreadable file
  unsigned char head[64] = {};
  const std::size_t n = static_cast<std::size_t>(std::min<std::uint64_t>(sizeof head, f.size()));
  f.read_at(0, head, n);
  const std::string ext = fs::path(path).extension().string();
  if (looks_like_npy(head, n)) return open_npy(path);
  if (looks_like_npz(head, n)) return open_npz(path);
  if (looks_like_safetensors(head, n, f.size())) return open_safetensors(path);
  if (ext == ".json") return open_safetensors(path);  // a sharded index
  if (ext == ".onnx" || looks_like_onnx(head, n)) return open_onnx(path);
  if (ext == ".safetensors") return open_safetensors(path);  // reports what is wrong with it
  if (ext == ".npy") return open_npy(path);
  if (ext == ".npz") return open_npz(path);
  throw usage_error("not a checkpoint lobit can read", path,
                    "lobit reads .safetensors (and sharded index .json), .npy, .npz and .onnx files");
}

}  // namespace lobit::io
