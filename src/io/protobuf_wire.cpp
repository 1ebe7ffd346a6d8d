#include "protobuf_wire.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <cstring>

#include "lobit/error.hpp"

namespace lobit::io::pb {

namespace {
constexpr std::size_t buffer_bytes = 1 << 16;
}

void corrupt(const RandomAccessFile& file, std::uint64_t at, const std::string& what) {
  throw usage_error(fmt::format("corrupted protobuf at byte {}: {}", at, what), file.path(),
                    "the file is damaged, truncated or not an ONNX model");
}

int decode_varint(const unsigned char* p, std::size_t n, std::uint64_t& value) {
  value = 0;
  for (std::size_t i = 0; i < 10; ++i) {
    if (i >= n) return 0;
    const unsigned char b = p[i];
    // The tenth byte carries bit 63 only: anything more does not fit 64 bits.
    if (i == 9 && b > 1) return -1;
    value |= static_cast<std::uint64_t>(b & 0x7f) << (7 * i);
    if (b < 0x80) return static_cast<int>(i + 1);
  }
  return -1;
}

WireReader::WireReader(const RandomAccessFile& file, std::uint64_t begin, std::uint64_t end)
    : file_(file), pos_(begin) {
  if (begin > end || end > file.size())
    corrupt(file, begin, fmt::format("range [{}, {}) is outside the file of {} bytes", begin, end, file.size()));
  limits_.push_back(end);
}

void WireReader::fill(std::uint64_t at) {
  if (buf_.empty()) buf_.resize(buffer_bytes);
  const std::uint64_t n = std::min<std::uint64_t>(buffer_bytes, limits_.front() - at);
  file_.read_at(at, buf_.data(), n);
  buf_start_ = at;
  buf_len_ = n;
}

std::uint8_t WireReader::byte() {
  if (pos_ >= limits_.back()) fail(pos_, depth() == 0 ? "a field runs past the end of the file"
                                                      : "a field runs past the end of its message");
  if (pos_ < buf_start_ || pos_ >= buf_start_ + buf_len_) fill(pos_);
  return buf_[static_cast<std::size_t>(pos_++ - buf_start_)];
}

std::uint64_t WireReader::varint() {
  const std::uint64_t at = pos_;
  std::uint64_t value = 0;
  for (int i = 0; i < 10; ++i) {
    const std::uint8_t b = byte();
    if (i == 9 && b > 1) fail(at, "varint does not fit 64 bits");
    value |= static_cast<std::uint64_t>(b & 0x7f) << (7 * i);
    if (b < 0x80) return value;
  }
  fail(at, "varint longer than 10 bytes");
}

bool WireReader::next(Field& f) {
  if (pos_ >= limits_.back()) return false;
  f = Field{};
  f.tag_offset = pos_;
  const std::uint64_t tag = varint();
  if (tag > 0xffffffffu) fail(f.tag_offset, "field tag does not fit 32 bits");
  f.number = static_cast<std::uint32_t>(tag >> 3);
  if (f.number == 0) fail(f.tag_offset, "field number 0");
  switch (tag & 7) {
    case 0:
      f.wire = Wire::varint;
      f.value = varint();
      break;
    case 1:
    case 5: {
      const int n = (tag & 7) == 1 ? 8 : 4;
      f.wire = n == 8 ? Wire::fixed64 : Wire::fixed32;
      for (int i = 0; i < n; ++i) f.value |= static_cast<std::uint64_t>(byte()) << (8 * i);
      break;
    }
    case 2: {
      f.wire = Wire::bytes;
      f.length = varint();
      f.offset = pos_;
      const std::uint64_t left = limits_.back() - pos_;
      if (f.length > left)
        fail(f.tag_offset, fmt::format("field {} declares {} bytes but the {} has {} left", f.number, f.length,
                                       depth() == 0 ? "file" : "enclosing message", left));
      pos_ += f.length;
      break;
    }
    default:
      fail(f.tag_offset, fmt::format("wire type {} in field {} (groups and reserved types are not used by ONNX)",
                                     tag & 7, f.number));
  }
  return true;
}

void WireReader::enter(const Field& f) {
  if (f.wire != Wire::bytes) fail(f.tag_offset, fmt::format("field {} should be a message", f.number));
  if (limits_.size() > max_depth) fail(f.tag_offset, fmt::format("messages nested deeper than {}", max_depth));
  limits_.push_back(f.end());
  pos_ = f.offset;
}

void WireReader::leave() {
  pos_ = limits_.back();
  limits_.pop_back();
}

std::string WireReader::string(const Field& f, std::size_t cap) {
  if (f.wire != Wire::bytes) fail(f.tag_offset, fmt::format("field {} should be a string", f.number));
  if (f.length > cap) fail(f.tag_offset, fmt::format("string of {} bytes in field {} (more than {})", f.length, f.number, cap));
  std::string s(static_cast<std::size_t>(f.length), '\0');
  if (f.length == 0) return s;
  if (f.length <= buffer_bytes && (f.offset < buf_start_ || f.end() > buf_start_ + buf_len_)) fill(f.offset);
  if (f.offset >= buf_start_ && f.end() <= buf_start_ + buf_len_)
    std::memcpy(s.data(), buf_.data() + (f.offset - buf_start_), s.size());
  else
    file_.read_at(f.offset, s.data(), f.length);
  return s;
}

}  // namespace lobit::io::pb
