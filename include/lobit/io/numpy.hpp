#pragma once
// NumPy arrays: .npy files (a magic string, a version, a Python dict literal giving the
// dtype, order and shape, then the raw elements) and .npz archives (a zip of NAME.npy
// members). Read as a Checkpoint; .npy written by a streaming writer.
#include <cstddef>
#include <cstdint>
#include <memory>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "lobit/io/checkpoint.hpp"
#include "lobit/io/dtype.hpp"
#include "lobit/io/file.hpp"

namespace lobit::io {

// The largest .npy prefix (magic, version, length field and dict) accepted: far more than
// any array of at most npy_max_rank axes needs, and bounded so a zip member's header can
// be read without decompressing the member.
inline constexpr std::size_t npy_max_header_bytes = std::size_t{128} << 10;
inline constexpr std::size_t npy_max_rank = 64;

// "\x93NUMPY" at the start.
bool looks_like_npy(const unsigned char* head, std::size_t n);
// A zip archive: a local file header ("PK\x03\x04") or, for an archive without members,
// the end-of-directory record ("PK\x05\x06").
bool looks_like_npz(const unsigned char* head, std::size_t n);

// A .npy header, parsed.
struct NpyHeader {
  int major = 1, minor = 0;
  DType dtype = DType::f32;
  bool big_endian = false;
  bool fortran_order = false;
  std::vector<std::uint64_t> shape;  // empty = scalar
  std::uint64_t data_offset = 0;     // bytes before the first element
  std::uint64_t data_bytes = 0;      // count * itemsize
};

// The length of the prefix (magic, version, length field, dict) that starts `head`, from
// its first 12 bytes; std::nullopt when fewer than the bytes needed are given.
// Throws lobit::Error (usage, naming `where`) for a bad magic or version, or a prefix
// longer than npy_max_header_bytes.
std::optional<std::uint64_t> npy_prefix_bytes(const unsigned char* head, std::size_t n, const std::string& where);

// Parses a whole prefix (n must be at least npy_prefix_bytes). Descr strings read:
// '<f8' '<f4' '<f2', '|i1' '|u1' '|b1', '<i2' '<u2' '<i4' '<u4' '<i8' '<u8', with '>'
// (big endian), '=' (native, taken as little endian) or no byte order. Throws
// lobit::Error (usage, naming `where`) for anything else: structured or void dtypes
// (bfloat16 and 8-bit float arrays saved through NumPy become these), complex, strings,
// objects, or a dict that is not exactly {'descr', 'fortran_order', 'shape'}.
NpyHeader parse_npy_header(const unsigned char* head, std::size_t n, const std::string& where);

// A .npy file; the tensor is named after the file stem ("w.npy" holds tensor "w"). The
// data must be exactly count * itemsize bytes: a shorter file is truncated, a longer one
// has a header that does not describe it.
std::unique_ptr<Checkpoint> open_npy(const std::string& path);

// A .npz archive: every member must be a NAME.npy array (tensor NAME). Headers are read
// at open. Stored (uncompressed) members are read in place; compressed members are
// decompressed on first use into a scratch file (once per member, checked against the
// archive's CRC and the header's size).
std::unique_ptr<Checkpoint> open_npz(const std::string& path);

// The descr string NpyWriter writes for t ("<f4", "|u1", ...); throws lobit::Error
// (usage) for bf16 and the 8-bit floats, which NumPy has no dtype for.
std::string npy_descr(DType t);

// Streams a version 1.0 .npy file, little endian, C order. Types: f64, f32, f16, i8, u8,
// i16, u16, i32, u32, i64, u64, boolean. The header is padded with spaces and ends in
// '\n' so the data starts at a multiple of 64 bytes.
class NpyWriter {
 public:
  NpyWriter(std::string path, DType dtype, std::vector<std::uint64_t> shape);
  // The next nbytes of the elements; throws lobit::Error (internal) past the planned size.
  void write(const void* data, std::uint64_t nbytes);
  // Throws lobit::Error (internal) unless exactly count * itemsize bytes were written.
  void commit();

  std::uint64_t data_bytes() const { return data_bytes_; }
  std::uint64_t header_bytes() const { return header_.size(); }

 private:
  std::uint64_t data_bytes_ = 0;
  std::string header_;  // built (and the type checked) before the file is created
  PlannedFileWriter out_;
};

}  // namespace lobit::io
