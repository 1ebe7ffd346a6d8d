// .npy: the header (a strict parser for the one Python dict literal the format uses), the
// single-array reader, and the streaming writer. The .npz reader (npz.cpp) shares the
// header parser.
#include <fmt/format.h>
#include <fmt/ranges.h>

#include <algorithm>
#include <cstring>
#include <filesystem>

#include "lobit/error.hpp"
#include "lobit/io/numpy.hpp"

namespace lobit::io {
namespace {

constexpr unsigned char kMagic[6] = {0x93, 'N', 'U', 'M', 'P', 'Y'};


const std::string kReadable =
    "lobit reads NumPy float (f2, f4, f8), signed and unsigned integer (i1 to i8, u1 to u8) and boolean (b1) arrays";

// The dict literal of a .npy header, e.g.
//   {'descr': '<f4', 'fortran_order': False, 'shape': (3, 4), }
// Strings in ' or " without escapes, True / False, tuples of non-negative decimal integers
// ("()", "(5,)", "(3, 4)"; an "L" suffix as Python 2 wrote long integers), whitespace
// between tokens, an optional trailing comma. Nothing else.
class DictParser {
 public:
  DictParser(std::string_view text, const std::string& where) : s_(text), where_(where) {}

  NpyHeader parse() {
    NpyHeader h;
    bool has_descr = false, has_order = false, has_shape = false;
    std::string descr;
    ws();
    expect('{', "the header does not start with '{'");
    ws();
    while (!at('}')) {
      const std::string key = string_literal("a key");
      ws();
      expect(':', fmt::format("no ':' after the key {}", quoted_name(key)));
      ws();
      if (key == "descr") {
        once(has_descr, key);
        if (at('['))
          fail("descr is a list of fields: a structured (record) array", kReadable + "; save each field as its own array");
        descr = string_literal("the descr");
      } else if (key == "fortran_order") {
        once(has_order, key);
        h.fortran_order = boolean();
      } else if (key == "shape") {
        once(has_shape, key);
        h.shape = tuple();
      } else {
        fail(fmt::format("the header has the key {}; a .npy header has exactly 'descr', 'fortran_order' and 'shape'",
                         quoted_name(key)));
      }
      ws();
      if (at(',')) {
        ++pos_;
        ws();
      } else if (!at('}')) {
        fail(fmt::format("expected ',' or '}}' at byte {} of the header dict", pos_));
      }
    }
    ++pos_;
    while (pos_ < s_.size() && is_ws(s_[pos_])) ++pos_;
    if (pos_ != s_.size()) fail(fmt::format("unexpected text after the header dict at byte {}", pos_));
    for (auto [has, key] : {std::pair{has_descr, "descr"}, std::pair{has_order, "fortran_order"},
                            std::pair{has_shape, "shape"}})
      if (!has) fail(fmt::format("the header has no '{}'", key));
    set_dtype(descr, h);
    return h;
  }

 private:
  static bool is_ws(char c) { return c == ' ' || c == '\t' || c == '\n' || c == '\r'; }
  void ws() {
    while (pos_ < s_.size() && is_ws(s_[pos_])) ++pos_;
  }
  bool at(char c) const { return pos_ < s_.size() && s_[pos_] == c; }
  [[noreturn]] void fail(std::string what, std::string hint = {}) const {
    throw usage_error(std::move(what), where_,
                      hint.empty() ? "the .npy header is malformed; the file may be corrupt" : std::move(hint));
  }
  void expect(char c, std::string what) {
    if (!at(c)) fail(std::move(what));
    ++pos_;
  }
  void once(bool& seen, const std::string& key) {
    if (seen) fail(fmt::format("the header has '{}' twice", key));
    seen = true;
  }
  std::string string_literal(std::string_view what) {
    if (!at('\'') && !at('"')) fail(fmt::format("expected {} as a quoted string at byte {} of the header", what, pos_));
    const char q = s_[pos_++];
    const std::size_t start = pos_;
    while (pos_ < s_.size() && s_[pos_] != q) {
      const unsigned char c = static_cast<unsigned char>(s_[pos_]);
      if (c == '\\' || c < 0x20 || c >= 0x7f)
        fail(fmt::format("{} has an escape or a non-ASCII character at byte {} of the header", what, pos_));
      ++pos_;
    }
    if (pos_ == s_.size()) fail(fmt::format("{} is an unterminated string", what));
    return std::string(s_.substr(start, pos_++ - start));
  }
  bool boolean() {
    for (auto [word, value] : {std::pair{std::string_view("True"), true}, std::pair{std::string_view("False"), false}})
      if (s_.substr(pos_, word.size()) == word) {
        pos_ += word.size();
        return value;
      }
    fail(fmt::format("fortran_order is not True or False (at byte {} of the header)", pos_));
  }
  std::uint64_t integer() {
    const std::size_t start = pos_;
    std::uint64_t v = 0;
    while (pos_ < s_.size() && s_[pos_] >= '0' && s_[pos_] <= '9') {
      const auto d = static_cast<std::uint64_t>(s_[pos_] - '0');
      if (v > (UINT64_MAX - d) / 10) fail("a shape entry is larger than 2^64");
      v = v * 10 + d;
      ++pos_;
    }
    if (pos_ == start) fail(fmt::format("shape entries must be non-negative integers (byte {} of the header)", pos_));
    if (at('L')) ++pos_;  // Python 2 long
    return v;
  }
  std::vector<std::uint64_t> tuple() {
    if (at('[')) fail("shape is a list; a .npy header gives it as a tuple");
    expect('(', fmt::format("shape is not a tuple (byte {} of the header)", pos_));
    std::vector<std::uint64_t> shape;
    ws();
    bool trailing_comma = false;
    while (!at(')')) {
      if (shape.size() >= npy_max_rank) fail(fmt::format("the shape has more than {} axes", npy_max_rank));
      shape.push_back(integer());
      ws();
      trailing_comma = false;
      if (at(',')) {
        ++pos_;
        trailing_comma = true;
        ws();
      } else if (!at(')')) {
        fail(fmt::format("expected ',' or ')' in the shape at byte {} of the header", pos_));
      }
    }
    ++pos_;
    // "(5)" is the integer 5 in Python, not a tuple.
    if (shape.size() == 1 && !trailing_comma) fail("shape is '(N)', an integer; a 1-D shape is written '(N,)'");
    return shape;
  }

  void set_dtype(const std::string& descr, NpyHeader& h) const {
    std::string_view d = descr;
    char order = '=';
    if (!d.empty() && (d[0] == '<' || d[0] == '>' || d[0] == '|' || d[0] == '=')) order = d[0], d.remove_prefix(1);
    const char kind = d.empty() ? '\0' : d[0];
    int size = 0;
    bool digits = d.size() >= 2;
    for (std::size_t i = 1; i < d.size(); ++i) {
      if (d[i] < '0' || d[i] > '9' || size > 1000) digits = false;
      else size = size * 10 + (d[i] - '0');
    }
    const std::string shown = "descr " + quoted_name(descr);
    if (kind == 'V')
      fail(shown + " is raw bytes (a void type)",
           "NumPy has no bfloat16 or 8-bit float type, so such arrays are saved as raw bytes that do not say their "
           "format; save the bit patterns as uint16 / uint8, or convert to float32, before saving");
    if (!digits) fail(shown + " is not a NumPy type string", kReadable);
    struct Known {
      char kind;
      int size;
      DType dtype;
    };
    static constexpr Known known[] = {
        {'f', 2, DType::f16}, {'f', 4, DType::f32}, {'f', 8, DType::f64}, {'i', 1, DType::i8},
        {'u', 1, DType::u8},  {'i', 2, DType::i16}, {'u', 2, DType::u16}, {'i', 4, DType::i32},
        {'u', 4, DType::u32}, {'i', 8, DType::i64}, {'u', 8, DType::u64}, {'b', 1, DType::boolean},
    };
    const Known* k = std::find_if(std::begin(known), std::end(known),
                                  [&](const Known& x) { return x.kind == kind && x.size == size; });
    if (k == std::end(known)) {
      std::string what = "is not a type lobit reads";
      if (kind == 'c') what = "is a complex type, which lobit does not read";
      else if (kind == 'f') what = "is a float size lobit does not read (extended precision)";
      else if (kind == 'S' || kind == 'U' || kind == 'a') what = "is a string type";
      else if (kind == 'O') what = "is a Python object array";
      else if (kind == 'M' || kind == 'm') what = "is a date or time type";
      fail(shown + " " + what, kReadable);
    }
    if (order == '|' && size > 1)
      fail(shown + " has byte order '|' (not applicable), but its elements have several bytes",
           "the header is malformed; '<' is little endian, '>' big endian");
    h.dtype = k->dtype;
    h.big_endian = order == '>' && size > 1;
  }

  std::string_view s_;
  const std::string& where_;
  std::size_t pos_ = 0;
};

std::uint32_t le(const unsigned char* p, int n) {
  std::uint32_t v = 0;
  for (int i = n - 1; i >= 0; --i) v = (v << 8) | p[i];
  return v;
}

class NpyCheckpoint final : public Checkpoint {
 public:
  NpyCheckpoint(std::string path, std::shared_ptr<const RandomAccessFile> file, TensorInfo t, std::uint64_t offset)
      : path_(std::move(path)), file_(std::move(file)), offset_(offset) {
    tensors_.push_back(std::move(t));
  }
  const std::string& path() const override { return path_; }
  std::string_view kind() const override { return "npy"; }

 protected:
  Extent locate(std::size_t i) const override {
    if (i != 0) throw Error(Error::Kind::internal, "tensor index out of range", path_);
    return Extent{file_, nullptr, offset_};
  }

 private:
  std::string path_;
  std::shared_ptr<const RandomAccessFile> file_;
  std::uint64_t offset_;
};

}  // namespace

bool looks_like_npy(const unsigned char* head, std::size_t n) {
  return n >= sizeof kMagic && std::memcmp(head, kMagic, sizeof kMagic) == 0;
}

bool looks_like_npz(const unsigned char* head, std::size_t n) {
  return n >= 4 && head[0] == 'P' && head[1] == 'K' && ((head[2] == 3 && head[3] == 4) || (head[2] == 5 && head[3] == 6));
}

std::optional<std::uint64_t> npy_prefix_bytes(const unsigned char* head, std::size_t n, const std::string& where) {
  if (n >= sizeof kMagic && !looks_like_npy(head, n))
    throw usage_error("does not start with the .npy magic \\x93NUMPY", where, "the file is not a .npy array");
  if (n < 8) return std::nullopt;
  const int major = head[6], minor = head[7];
  if (major < 1 || major > 3 || minor != 0)
    throw usage_error(fmt::format(".npy format version {}.{}; lobit reads versions 1.0, 2.0 and 3.0", major, minor),
                      where, "save the array with a NumPy that writes one of these versions");
  const int len_bytes = major == 1 ? 2 : 4;
  if (n < static_cast<std::size_t>(8 + len_bytes)) return std::nullopt;
  const std::uint64_t total = 8 + static_cast<std::uint64_t>(len_bytes) + le(head + 8, len_bytes);
  if (total > npy_max_header_bytes)
    throw usage_error(fmt::format("the .npy header length field says {} bytes, more than the {} KiB lobit accepts",
                                  total - 8 - static_cast<std::uint64_t>(len_bytes), npy_max_header_bytes >> 10),
                      where, "the header is corrupt, or the array has a structured type lobit does not read");
  return total;
}

NpyHeader parse_npy_header(const unsigned char* head, std::size_t n, const std::string& where) {
  const auto total = npy_prefix_bytes(head, n, where);
  if (!total || *total > n)
    throw usage_error(fmt::format("the .npy header is cut off: {} bytes given, the header needs {}", n,
                                  total ? std::to_string(*total) : std::string("at least 10")),
                      where, "the file is truncated");
  const int major = head[6];
  const std::size_t text_begin = major == 1 ? 10 : 12;
  DictParser parser(std::string_view(reinterpret_cast<const char*>(head) + text_begin,
                                     static_cast<std::size_t>(*total) - text_begin),
                    where);
  NpyHeader h = parser.parse();
  h.major = major;
  h.minor = head[7];
  h.data_offset = *total;
  std::uint64_t count = 1;
  bool overflow = false;
  for (std::uint64_t d : h.shape) overflow = overflow || __builtin_mul_overflow(count, d, &count);
  overflow = overflow || __builtin_mul_overflow(count, static_cast<std::uint64_t>(dtype_bytes(h.dtype)), &h.data_bytes);
  if (overflow) {
    TensorInfo t;
    t.shape = h.shape;
    throw usage_error(fmt::format("the shape {} needs more than 2^64 bytes", t.shape_text()), where,
                      "the .npy header is corrupt");
  }
  return h;
}

std::unique_ptr<Checkpoint> open_npy(const std::string& path) {
  auto file = std::make_shared<const RandomAccessFile>(path);
  const std::uint64_t size = file->size();
  unsigned char head[12] = {};
  const std::size_t n = static_cast<std::size_t>(std::min<std::uint64_t>(sizeof head, size));
  file->read_at(0, head, n);
  if (n < sizeof kMagic || !looks_like_npy(head, n))
    throw usage_error("does not start with the .npy magic \\x93NUMPY", path, "the file is not a .npy array");
  const auto total = npy_prefix_bytes(head, n, path);
  if (!total)
    throw usage_error(fmt::format("the file has {} bytes and ends inside the .npy header", size), path,
                      "the file is truncated");
  if (*total > size)
    throw usage_error(fmt::format("the .npy header length field says the header ends at byte {}, but the file has {} "
                                  "bytes",
                                  *total, size),
                      path, "the file is truncated or its header is corrupt");
  std::vector<unsigned char> prefix(static_cast<std::size_t>(*total));
  file->read_at(0, prefix.data(), prefix.size());
  const NpyHeader h = parse_npy_header(prefix.data(), prefix.size(), path);

  TensorInfo t;
  t.name = std::filesystem::path(path).stem().string();
  t.file = path;
  t.dtype = h.dtype;
  t.shape = h.shape;
  t.big_endian = h.big_endian;
  t.fortran_order = h.fortran_order;
  t.origin = fmt::format(".npy version {}.{}", h.major, h.minor);
  const std::uint64_t data = size - h.data_offset;
  if (data < h.data_bytes)
    throw usage_error(fmt::format("the data has {} bytes but {} {} needs {}", data, dtype_name(h.dtype),
                                  t.shape_text(), h.data_bytes),
                      path, "the file is truncated");
  if (data > h.data_bytes)
    throw usage_error(fmt::format("{} bytes follow the {} bytes of {} {}", data - h.data_bytes, h.data_bytes,
                                  dtype_name(h.dtype), t.shape_text()),
                      path, "the header does not describe the data; the file may be corrupt");
  return std::make_unique<NpyCheckpoint>(path, std::move(file), std::move(t), h.data_offset);
}

std::string npy_descr(DType t) {
  switch (t) {
    case DType::f64: return "<f8";
    case DType::f32: return "<f4";
    case DType::f16: return "<f2";
    case DType::i8: return "|i1";
    case DType::u8: return "|u1";
    case DType::i16: return "<i2";
    case DType::u16: return "<u2";
    case DType::i32: return "<i4";
    case DType::u32: return "<u4";
    case DType::i64: return "<i8";
    case DType::u64: return "<u8";
    case DType::boolean: return "|b1";
    default: break;
  }
  throw usage_error(fmt::format("NumPy has no type for {}", dtype_name(t)), "npy writer",
                    "write the bit patterns as u16 (bf16) or u8 (8-bit floats)");
}

namespace {

std::string npy_header(const std::string& path, DType dtype, const std::vector<std::uint64_t>& shape,
                       std::uint64_t& data_bytes) {
  if (shape.size() > npy_max_rank)
    throw usage_error(fmt::format("{} axes, more than the {} a .npy header may have here", shape.size(), npy_max_rank),
                      path);
  std::string tuple = fmt::format("({}{})", fmt::join(shape, ", "), shape.size() == 1 ? "," : "");
  std::uint64_t count = 1;
  bool overflow = false;
  for (std::uint64_t d : shape) overflow = overflow || __builtin_mul_overflow(count, d, &count);
  overflow = overflow || __builtin_mul_overflow(count, static_cast<std::uint64_t>(dtype_bytes(dtype)), &data_bytes);
  if (overflow) throw usage_error(fmt::format("the shape {} needs more than 2^64 bytes", tuple), path);
  std::string dict = fmt::format("{{'descr': '{}', 'fortran_order': False, 'shape': {}, }}", npy_descr(dtype), tuple);
  // Spaces and a final newline so the data starts at a multiple of 64 bytes (NumPy's
  // format documentation, common practice).
  const std::size_t unpadded = 10 + dict.size() + 1;
  dict.append((64 - unpadded % 64) % 64, ' ');
  dict += '\n';
  std::string out = "\x93NUMPY";
  out += '\x01';
  out += '\x00';
  out += static_cast<char>(dict.size() & 0xff);
  out += static_cast<char>(dict.size() >> 8);
  return out + dict;
}

}  // namespace

NpyWriter::NpyWriter(std::string path, DType dtype, std::vector<std::uint64_t> shape)
    : header_(npy_header(path, dtype, shape, data_bytes_)), out_(std::move(path), header_, data_bytes_, "the array") {}

void NpyWriter::write(const void* data, std::uint64_t nbytes) { out_.write(data, nbytes); }

void NpyWriter::commit() {
  out_.commit();
}

}  // namespace lobit::io
