// The reader-independent part of a checkpoint: ranged reads with conversion, and
// opening a file by its content.
#include "lobit/io/checkpoint.hpp"

#include <fmt/format.h>
#include <fmt/ranges.h>

#include <algorithm>
#include <vector>

#include "lobit/error.hpp"

namespace lobit::io {

std::uint64_t TensorInfo::count() const {
  std::uint64_t n = 1;
  for (std::uint64_t d : shape) {
    if (d != 0 && n > UINT64_MAX / d)
      throw usage_error(fmt::format("tensor \"{}\": the shape {} has more elements than 2^64", name, shape_text()),
                        file, "the header is corrupt");
    n *= d;
  }
  return n;
}

std::string shape_text(std::span<const std::uint64_t> shape) { return fmt::format("[{}]", fmt::join(shape, ", ")); }

std::string TensorInfo::shape_text() const { return io::shape_text(shape); }

std::string quoted_name(std::string_view s) {
  if (s.size() <= 200) return fmt::format("{:?}", s);
  return fmt::format("{:?}... ({} bytes)", s.substr(0, 200), s.size());
}

std::optional<std::size_t> Checkpoint::find(std::string_view name) const {
  for (std::size_t i = 0; i < tensors_.size(); ++i)
    if (tensors_[i].name == name) return i;
  return std::nullopt;
}

void Checkpoint::read_raw(std::size_t i, std::uint64_t first, std::uint64_t count, unsigned char* out) const {
  const TensorInfo& t = tensors_.at(i);
  const std::uint64_t n = t.count();
  if (first > n || count > n - first)
    throw Error(Error::Kind::internal,
                fmt::format("tensor \"{}\": elements [{}, {}) are outside its {} elements", t.name, first,
                            first + count, n),
                t.file);
  if (count == 0) return;
  const Extent e = locate(i);
  const std::uint64_t w = static_cast<std::uint64_t>(dtype_bytes(t.dtype));
  if (e.scratch)
    e.scratch->read_at(e.offset + first * w, out, count * w);
  else
    e.file->read_at(e.offset + first * w, out, count * w);
}

namespace {
template <class T, class Decode>
void read_converted(const Checkpoint& c, std::size_t i, std::uint64_t first, std::uint64_t count, T* out,
                    Decode decode) {
  const TensorInfo& t = c.tensors().at(i);
  const std::uint64_t w = static_cast<std::uint64_t>(dtype_bytes(t.dtype));
  if (w == sizeof(T) && !t.big_endian && ((std::is_same_v<T, float> && t.dtype == DType::f32) ||
                                          (std::is_same_v<T, double> && t.dtype == DType::f64))) {
    c.read_raw(i, first, count, reinterpret_cast<unsigned char*>(out));
    return;
  }
  // Bounded buffer: 1 MiB of stored bytes at a time.
  const std::uint64_t step = std::max<std::uint64_t>(1, (1u << 20) / w);
  thread_local std::vector<unsigned char> buf;
  buf.resize(static_cast<std::size_t>(std::min(step, count) * w));
  for (std::uint64_t done = 0; done < count;) {
    const std::uint64_t k = std::min(step, count - done);
    c.read_raw(i, first + done, k, buf.data());
    decode(t.dtype, buf.data(), static_cast<std::size_t>(k), t.big_endian, out + done);
    done += k;
  }
}
}  // namespace

void Checkpoint::read_f32(std::size_t i, std::uint64_t first, std::uint64_t count, float* out) const {
  read_converted(*this, i, first, count, out, decode_to_f32);
}

void Checkpoint::read_f64(std::size_t i, std::uint64_t first, std::uint64_t count, double* out) const {
  read_converted(*this, i, first, count, out, decode_to_f64);
}

}  // namespace lobit::io
