#pragma once
// A checkpoint: named tensors in one or more files, read in element ranges with
// bounded memory. Readers (safetensors, .npy/.npz, ONNX) list the tensors when the
// file is opened and locate the bytes on demand; nothing is loaded whole.
#include <cstdint>
#include <memory>
#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "lobit/io/dtype.hpp"
#include "lobit/io/file.hpp"

namespace lobit::io {

// The axes a kernel reduces over when the tensor is a weight, as the file tells it
// (an ONNX graph) or as inferred from the shape. Axes are logical (as in `shape`).
struct AxisHint {
  std::vector<int> reduce;  // sorted, non-empty
  std::string reason;       // e.g. "MatMul input B [K, N]", "Conv weight [out, in, kh, kw]"
};

// Where a tensor's elements are: `count` elements of `dtype` stored contiguously
// from `offset` in `file` (or in `scratch` when the reader had to decode them first).
struct Extent {
  std::shared_ptr<const RandomAccessFile> file;
  std::shared_ptr<const ScratchFile> scratch;
  std::uint64_t offset = 0;
};

struct TensorInfo {
  std::string name;           // unique within the checkpoint
  std::string file;           // the file that holds (or describes) it, for messages and per-file totals
  DType dtype = DType::f32;
  std::vector<std::uint64_t> shape;  // logical shape; empty = scalar (one element)
  bool big_endian = false;
  bool fortran_order = false;        // elements stored with the first axis fastest
  std::optional<AxisHint> axis_hint;  // from the file's graph, where it has one
  std::string origin;                 // how the reader found it, e.g. "initializer", "Constant node in If/else_branch"

  std::uint64_t count() const;   // product of the shape (1 for a scalar); throws on overflow
  std::uint64_t bytes() const { return count() * static_cast<std::uint64_t>(dtype_bytes(dtype)); }
  std::string shape_text() const;  // "[4096, 11008]"
};

class Checkpoint {
 public:
  virtual ~Checkpoint() = default;

  // The path the user gave, and the format ("safetensors", "npy", "npz", "onnx").
  virtual const std::string& path() const = 0;
  virtual std::string_view kind() const = 0;
  const std::vector<TensorInfo>& tensors() const { return tensors_; }
  // Index of the tensor by exact name.
  std::optional<std::size_t> find(std::string_view name) const;

  // Reads elements [first, first + count) of tensor i in storage order. Safe to call
  // from several threads. Throws lobit::Error naming the file and tensor.
  void read_raw(std::size_t i, std::uint64_t first, std::uint64_t count, unsigned char* out) const;
  void read_f32(std::size_t i, std::uint64_t first, std::uint64_t count, float* out) const;
  void read_f64(std::size_t i, std::uint64_t first, std::uint64_t count, double* out) const;

 protected:
  // Where tensor i's bytes are. Called from any thread; readers that decode lazily
  // lock inside. Throws lobit::Error on a malformed tensor.
  virtual Extent locate(std::size_t i) const = 0;
  std::vector<TensorInfo> tensors_;
};

// "[4096, 11008]" ("[]" for a scalar).
std::string shape_text(std::span<const std::uint64_t> shape);

// A tensor or member name as it appears in a one-line message: quoted and escaped,
// names longer than 200 bytes shortened.
std::string quoted_name(std::string_view name);

// Opens a checkpoint by its content (magic bytes), falling back to the extension:
// .safetensors (or a sharded index .json), .npy, .npz, .onnx. Throws lobit::Error
// (usage) naming the file when it is not one of these or is malformed.
std::unique_ptr<Checkpoint> open_checkpoint(const std::string& path);

}  // namespace lobit::io
