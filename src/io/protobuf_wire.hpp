#pragma once
// A reader of the protobuf wire format straight from a file: tags, varints, fixed
// values and the extents of length-delimited fields, through one small buffer that
// is refilled with positioned reads. Length-delimited payloads are never loaded
// unless asked for (strings, with a cap); a nested message is entered by pushing its
// end as the new limit, so every length is checked against the enclosing message and
// the file before it is used. Errors say "corrupted protobuf at byte N" and name the file.
#include <algorithm>
#include <cstdint>
#include <string>
#include <vector>

#include "lobit/io/file.hpp"

namespace lobit::io::pb {

// Wire types of the encoding (protobuf encoding documentation, from memory): 3 and 4
// (groups) and 6, 7 are not used by ONNX and are refused.
enum class Wire : std::uint8_t { varint = 0, fixed64 = 1, bytes = 2, fixed32 = 5 };

struct Field {
  std::uint32_t number = 0;
  Wire wire = Wire::varint;
  std::uint64_t tag_offset = 0;  // file offset of the tag, for messages
  std::uint64_t value = 0;       // varint, fixed32 or fixed64 value
  std::uint64_t offset = 0;      // bytes: file offset of the payload
  std::uint64_t length = 0;      // bytes: payload length
  std::uint64_t end() const { return offset + length; }
};

// Throws lobit::Error (usage) "corrupted protobuf at byte N: what" naming the file.
[[noreturn]] void corrupt(const RandomAccessFile& file, std::uint64_t at, const std::string& what);

class WireReader {
 public:
  // Reads [begin, end) of the file (end <= file size).
  WireReader(const RandomAccessFile& file, std::uint64_t begin, std::uint64_t end);

  std::uint64_t position() const { return pos_; }
  std::uint64_t limit() const { return limits_.back(); }
  std::size_t depth() const { return limits_.size() - 1; }

  // The next field before the current limit (false at the limit). A length-delimited
  // field's payload is checked to lie within the limit and skipped: call enter() to
  // walk it as a message, or read it with the functions below.
  bool next(Field& f);

  // Walks f's payload as a message until leave(); at most max_depth levels.
  void enter(const Field& f);
  void leave();

  // The payload of a bytes field as text; longer than `cap` bytes: corrupt.
  std::string string(const Field& f, std::size_t cap);
  // Reads a varint at the reader's position, bounded by the limit.
  std::uint64_t varint();

  [[noreturn]] void fail(std::uint64_t at, const std::string& what) const { corrupt(file_, at, what); }

  const RandomAccessFile& file() const { return file_; }

  static constexpr std::size_t max_depth = 256;

 private:
  std::uint8_t byte();  // at pos_ (< limit), through the buffer
  void fill(std::uint64_t at);

  const RandomAccessFile& file_;
  std::uint64_t pos_;
  std::vector<std::uint64_t> limits_;
  std::vector<unsigned char> buf_;
  std::uint64_t buf_start_ = 0, buf_len_ = 0;
};

// Element-by-element walk of a packed or unpacked repeated scalar field's bytes,
// used to count and to decode them. Calls `each(value)` for every varint in
// [offset, offset + length) of the file; throws (corrupt) on a varint that runs
// past the end or is longer than 10 bytes. Returns the count.
template <class Each>
std::uint64_t for_each_packed_varint(const RandomAccessFile& file, std::uint64_t offset, std::uint64_t length,
                                     Each&& each);

// Decodes one varint from memory: returns the number of bytes used, 0 if incomplete
// (fewer than 10 bytes given and no terminating byte), -1 if corrupt (10 bytes
// without an end, or a tenth byte above 1).
int decode_varint(const unsigned char* p, std::size_t n, std::uint64_t& value);

// --- implementation of the template ---

template <class Each>
std::uint64_t for_each_packed_varint(const RandomAccessFile& file, std::uint64_t offset, std::uint64_t length,
                                     Each&& each) {
  constexpr std::size_t chunk = 1 << 16;
  std::vector<unsigned char> storage(chunk + 16);
  unsigned char* buf = storage.data();
  std::size_t have = 0;  // bytes in buf not yet consumed, at its start
  std::uint64_t next = offset, end = offset + length, count = 0;
  std::uint64_t at = offset;  // file offset of buf[0]
  while (next < end || have > 0) {
    if (next < end && have < 10) {
      const std::uint64_t n = std::min<std::uint64_t>(chunk, end - next);
      file.read_at(next, buf + have, n);
      have += static_cast<std::size_t>(n);
      next += n;
    }
    std::size_t p = 0;
    while (p < have) {
      std::uint64_t v = 0;
      const int used = decode_varint(buf + p, have - p, v);
      if (used > 0) {
        each(v);
        ++count;
        p += static_cast<std::size_t>(used);
        continue;
      }
      if (used < 0 || next >= end)
        corrupt(file, at + p, used < 0 ? "varint longer than 10 bytes" : "packed varint runs past the end of its field");
      break;  // incomplete: keep the tail and read more
    }
    std::copy(buf + p, buf + have, buf);
    have -= p;
    at += p;
  }
  return count;
}

}  // namespace lobit::io::pb
