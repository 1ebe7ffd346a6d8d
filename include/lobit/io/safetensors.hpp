#pragma once
// safetensors files: an 8-byte little-endian header length, a JSON header naming each
// tensor's dtype, shape and byte range, then the data. Read as a Checkpoint (one file or
// a sharded index JSON with a "weight_map"), written by a streaming writer.
#include <cstddef>
#include <cstdint>
#include <memory>
#include <optional>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "lobit/io/checkpoint.hpp"
#include "lobit/io/dtype.hpp"
#include "lobit/io/file.hpp"

namespace lobit::io {

// Limits on what a header may claim, checked before anything is allocated from it.
inline constexpr std::uint64_t safetensors_max_header_bytes = std::uint64_t{100} << 20;
inline constexpr std::uint64_t safetensors_max_index_bytes = std::uint64_t{32} << 20;
inline constexpr std::size_t safetensors_max_rank = 64;

// A .safetensors file, or a sharded index JSON ({"metadata": ..., "weight_map": {tensor:
// shard file relative to the index}}). Every tensor of every shard is listed (also one the
// map leaves out); a tensor the map names that its shard lacks is an error. Tensors with a
// zero in the shape are listed with count 0 (callers refuse to score them). Gaps between
// tensors' byte ranges and bytes after the last one are accepted; overlaps are not.
// Throws lobit::Error (usage) naming the file and the tensor.
std::unique_ptr<Checkpoint> open_safetensors(const std::string& path);

// Whether the first n bytes of a file of file_size bytes start like a safetensors file:
// a header length that fits in the file, and a header that starts with '{'.
bool looks_like_safetensors(const unsigned char* head, std::size_t n, std::uint64_t file_size);

// The header's dtype string for a DType ("F32", "BF16", "F8_E4M3", "I8", "BOOL", ...), and
// back. write_dtype_name throws lobit::Error (usage) for the types safetensors has no
// string for (f8_e4m3_nz, f8_e5m2_nz).
std::string_view write_dtype_name(DType t);
std::optional<DType> parse_safetensors_dtype(std::string_view s);

struct PlannedTensor {
  std::string name;
  DType dtype = DType::f32;
  std::vector<std::uint64_t> shape;  // empty = scalar
};

// Streams a safetensors file: the header is written first from the plan (keys in plan
// order, "__metadata__" first when given, padded with spaces so the data starts at a
// multiple of 8 bytes), then the data of the tensors back to back in plan order. Nothing
// appears under the final name before commit(); a writer destroyed without commit()
// leaves nothing behind.
class SafetensorsWriter {
 public:
  // Throws lobit::Error (usage) for a duplicate or reserved name, a dtype safetensors
  // cannot hold, a shape whose byte count overflows, or an unwritable folder.
  SafetensorsWriter(std::string path, std::vector<PlannedTensor> plan,
                    std::vector<std::pair<std::string, std::string>> metadata = {});
  // The next nbytes of data, continuing across tensor boundaries in plan order. Throws
  // lobit::Error (internal) when more than the plan's bytes are written.
  void write(const void* data, std::uint64_t nbytes);
  // Throws lobit::Error (internal) unless exactly the planned bytes were written; then
  // syncs and renames the file into place.
  void commit();

  std::uint64_t data_bytes() const { return data_bytes_; }        // the plan's total
  std::uint64_t header_bytes() const { return header_.size(); }  // 8 + the padded JSON

 private:
  // Declared in this order so the plan is checked (and the header built) before the
  // temporary file is created.
  std::uint64_t data_bytes_ = 0;
  std::string header_;
  PlannedFileWriter out_;
};

}  // namespace lobit::io
