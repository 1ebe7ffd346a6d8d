// safetensors reader (single files and sharded indexes) and streaming writer.
//
// The JSON header is read through nlohmann's SAX interface from 1 MiB chunks of the file,
// so a header costs memory for what it describes (the tensor list), never a DOM of the
// whole text; every field is checked against the file before a tensor is listed.
#include "lobit/io/safetensors.hpp"

#include <fmt/format.h>
#include <fmt/ranges.h>

#include <algorithm>
#include <charconv>
#include <array>
#include <cstring>
#include <filesystem>
#include <iterator>
#include <nlohmann/json.hpp>
#include <unordered_map>
#include <unordered_set>

#include "lobit/error.hpp"

namespace lobit::io {
namespace {

using json = nlohmann::json;

struct DTypeName {
  std::string_view name;
  DType dtype;
};
// The dtype strings of the format (F8 types: the OCP OFP8 E4M3 and E5M2 encodings).
constexpr std::array<DTypeName, 15> kDTypeNames{{
    {"F64", DType::f64},
    {"F32", DType::f32},
    {"F16", DType::f16},
    {"BF16", DType::bf16},
    {"F8_E4M3", DType::f8_e4m3},
    {"F8_E5M2", DType::f8_e5m2},
    {"I8", DType::i8},
    {"U8", DType::u8},
    {"I16", DType::i16},
    {"U16", DType::u16},
    {"I32", DType::i32},
    {"U32", DType::u32},
    {"I64", DType::i64},
    {"U64", DType::u64},
    {"BOOL", DType::boolean},
}};

std::string known_dtypes() {
  std::string s;
  for (const auto& d : kDTypeNames) s += (s.empty() ? "" : ", ") + std::string(d.name);
  return s;
}

// A name as it appears in a one-line message: quoted, with escapes for control characters

bool mul_overflows(std::uint64_t a, std::uint64_t b, std::uint64_t& out) { return __builtin_mul_overflow(a, b, &out); }

std::uint64_t le64(const unsigned char* p) {
  std::uint64_t v = 0;
  for (int i = 7; i >= 0; --i) v = (v << 8) | p[i];
  return v;
}

// A forward-only view of bytes [begin, end) of a file for nlohmann's iterator input,
// read in 1 MiB chunks.
class ChunkedText {
 public:
  ChunkedText(const RandomAccessFile& f, std::uint64_t begin, std::uint64_t end)
      : f_(f), begin_(begin), end_(end), buf_(static_cast<std::size_t>(std::min<std::uint64_t>(end - begin, 1u << 20))) {}

  const char& at(std::uint64_t pos) {
    if (pos < buf_pos_ || pos >= buf_pos_ + buf_len_) {
      buf_pos_ = pos;
      buf_len_ = std::min<std::uint64_t>(buf_.size(), end_ - pos);
      f_.read_at(pos, buf_.data(), buf_len_);
    }
    return buf_[static_cast<std::size_t>(pos - buf_pos_)];
  }

  class Iterator {
   public:
    using iterator_category = std::input_iterator_tag;
    using value_type = char;
    using difference_type = std::ptrdiff_t;
    using pointer = const char*;
    using reference = const char&;
    Iterator(ChunkedText* t, std::uint64_t pos) : t_(t), pos_(pos) {}
    const char& operator*() const { return t_->at(pos_); }
    Iterator& operator++() {
      ++pos_;
      return *this;
    }
    Iterator operator++(int) {
      Iterator old = *this;
      ++pos_;
      return old;
    }
    bool operator==(const Iterator& o) const { return pos_ == o.pos_; }
    bool operator!=(const Iterator& o) const { return pos_ != o.pos_; }

   private:
    ChunkedText* t_;
    std::uint64_t pos_;
  };
  Iterator begin() { return {this, begin_}; }
  Iterator end() { return {this, end_}; }

 private:
  const RandomAccessFile& f_;
  std::uint64_t begin_, end_;
  std::vector<char> buf_;
  std::uint64_t buf_pos_ = 0, buf_len_ = 0;
};

// nlohmann's message without its "[json.exception...] " tag.
std::string json_error_text(const nlohmann::detail::exception& ex) {
  std::string s = ex.what();
  if (!s.empty() && s[0] == '[') {
    const auto close = s.find("] ");
    if (close != std::string::npos) s.erase(0, close + 2);
  }
  return s;
}

// Events the handlers below do not expect; each turns into an error naming the context.
enum class Token { null, boolean, integer, unsigned_integer, number, string, object, array, end_object, end_array };
std::string_view token_text(Token t) {
  switch (t) {
    case Token::null: return "null";
    case Token::boolean: return "a boolean";
    case Token::integer: return "a negative integer";
    case Token::unsigned_integer: return "an integer";
    case Token::number: return "a number with a fraction or an exponent";
    case Token::string: return "a string";
    case Token::object: return "an object";
    case Token::array: return "an array";
    case Token::end_object: return "the end of an object";
    case Token::end_array: return "the end of an array";
  }
  return "a value";
}

// Shared SAX plumbing: subclasses see one `value` call per token and can skip a whole
// value (with any nesting) by setting skip_.
class SaxBase {
 public:
  explicit SaxBase(std::string where, std::string what_text) : where_(std::move(where)), what_(std::move(what_text)) {}
  virtual ~SaxBase() = default;

  bool null() { return dispatch(Token::null, 0, nullptr); }
  bool boolean(bool) { return dispatch(Token::boolean, 0, nullptr); }
  bool number_integer(json::number_integer_t v) {
    // nlohmann reports non-negative integers as unsigned; this is a negative one.
    (void)v;
    return dispatch(Token::integer, 0, nullptr);
  }
  bool number_unsigned(json::number_unsigned_t v) { return dispatch_unsigned(v); }
  bool number_float(json::number_float_t, const std::string&) { return dispatch(Token::number, 0, nullptr); }
  bool string(std::string& s) { return dispatch(Token::string, 0, &s); }
  bool binary(json::binary_t&) { return dispatch(Token::null, 0, nullptr); }
  bool start_object(std::size_t) {
    if (skip_ > 0) return ++skip_, true;
    return on_token(Token::object, 0, nullptr);
  }
  bool end_object() {
    if (skip_ > 0) return --skip_, true;
    return on_token(Token::end_object, 0, nullptr);
  }
  bool start_array(std::size_t) {
    if (skip_ > 0) return ++skip_, true;
    return on_token(Token::array, 0, nullptr);
  }
  bool end_array() {
    if (skip_ > 0) return --skip_, true;
    return on_token(Token::end_array, 0, nullptr);
  }
  bool key(std::string& k) {
    if (skip_ > 0) return true;
    on_key(k);
    return true;
  }
  bool parse_error(std::size_t position, const std::string&, const nlohmann::detail::exception& ex) {
    throw usage_error(fmt::format("{} is not valid JSON at byte {}: {}", what_, position, json_error_text(ex)),
                      where_, "the file is corrupt or not a safetensors file");
  }

 protected:
  virtual bool on_token(Token t, std::uint64_t u, std::string* s) = 0;
  virtual bool on_unsigned(std::uint64_t u) = 0;
  virtual void on_key(std::string& k) = 0;
  // Skip the value that starts with token t (a whole object or array when t opens one).
  void skip_value(Token t) {
    if (t == Token::object || t == Token::array) skip_ = 1;
  }

  std::string where_, what_;

 private:
  bool dispatch(Token t, std::uint64_t u, std::string* s) {
    if (skip_ > 0) return true;
    return on_token(t, u, s);
  }
  bool dispatch_unsigned(std::uint64_t u) {
    if (skip_ > 0) return true;
    return on_unsigned(u);
  }
  int skip_ = 0;
};

// One header entry as read, before it is checked against the file.
struct Entry {
  std::string name;
  std::string dtype;
  std::vector<std::uint64_t> shape;
  std::vector<std::uint64_t> offsets;
  bool has_dtype = false, has_shape = false, has_offsets = false;
};

// The header of a single file: {"__metadata__": {str: str}, NAME: {"dtype": str, "shape":
// [uint...], "data_offsets": [uint, uint]}, ...}. Unknown keys inside an entry are skipped.
class HeaderSax final : public SaxBase {
 public:
  explicit HeaderSax(std::string where) : SaxBase(std::move(where), "the header") {}
  std::vector<Entry> entries;
  std::vector<std::pair<std::string, std::string>> metadata;

 private:
  enum class State { start, top, top_value, meta, meta_value, entry, entry_value, shape, offsets, done };
  enum class Field { dtype, shape, offsets, other };

  [[noreturn]] void fail(std::string what) const {
    throw usage_error(std::move(what), where_, "the header is malformed; the file may be corrupt");
  }
  std::string tensor() const { return "tensor " + quoted_name(entries.back().name); }

  bool on_unsigned(std::uint64_t u) override {
    switch (state_) {
      case State::shape:
        if (entries.back().shape.size() >= safetensors_max_rank)
          fail(fmt::format("{}: the shape has more than {} axes", tensor(), safetensors_max_rank));
        entries.back().shape.push_back(u);
        return true;
      case State::offsets:
        if (entries.back().offsets.size() >= 2)
          fail(fmt::format("{}: data_offsets must be two integers [begin, end]", tensor()));
        entries.back().offsets.push_back(u);
        return true;
      default: return on_token(Token::unsigned_integer, u, nullptr);
    }
  }

  bool on_token(Token t, std::uint64_t, std::string* s) override {
    switch (state_) {
      case State::start:
        if (t != Token::object) fail(fmt::format("the header is {}, not a JSON object", token_text(t)));
        state_ = State::top;
        return true;
      case State::top:  // only keys or the end arrive here
        state_ = State::done;
        return true;
      case State::top_value:
        if (is_meta_) {
          if (t != Token::object)
            fail(fmt::format("\"__metadata__\" is {}, not an object of strings", token_text(t)));
          state_ = State::meta;
        } else {
          if (t != Token::object)
            fail(fmt::format("{}: the entry is {}, not an object with dtype, shape and data_offsets", tensor(),
                             token_text(t)));
          state_ = State::entry;
        }
        return true;
      case State::meta:  // end of the metadata object
        state_ = State::top;
        return true;
      case State::meta_value:
        if (t != Token::string)
          fail(fmt::format("\"__metadata__\" value for key {} is {}, not a string", quoted_name(metadata.back().first),
                           token_text(t)));
        metadata.back().second = std::move(*s);
        state_ = State::meta;
        return true;
      case State::entry: {  // end of the entry object
        const Entry& e = entries.back();
        for (auto [has, field] : {std::pair{e.has_dtype, "dtype"}, std::pair{e.has_shape, "shape"},
                                  std::pair{e.has_offsets, "data_offsets"}})
          if (!has) fail(fmt::format("{}: the entry has no \"{}\"", tensor(), field));
        state_ = State::top;
        return true;
      }
      case State::entry_value:
        state_ = State::entry;
        switch (field_) {
          case Field::dtype:
            if (t != Token::string) fail(fmt::format("{}: dtype is {}, not a string", tensor(), token_text(t)));
            entries.back().dtype = std::move(*s);
            return true;
          case Field::shape:
            if (t != Token::array)
              fail(fmt::format("{}: shape is {}, not an array of integers", tensor(), token_text(t)));
            state_ = State::shape;
            return true;
          case Field::offsets:
            if (t != Token::array)
              fail(fmt::format("{}: data_offsets is {}, not an array [begin, end]", tensor(), token_text(t)));
            state_ = State::offsets;
            return true;
          case Field::other: skip_value(t); return true;
        }
        return true;
      case State::shape:
        if (t == Token::end_array) {
          state_ = State::entry;
          return true;
        }
        fail(fmt::format("{}: shape entry {} is {}, not a non-negative integer", tensor(), entries.back().shape.size(),
                         token_text(t)));
      case State::offsets:
        if (t == Token::end_array && entries.back().offsets.size() == 2) {
          state_ = State::entry;
          return true;
        }
        fail(fmt::format("{}: data_offsets must be two non-negative integers [begin, end]", tensor()));
      case State::done: return true;
    }
    return true;
  }

  void on_key(std::string& k) override {
    switch (state_) {
      case State::top:
        is_meta_ = k == "__metadata__";
        if (is_meta_) {
          if (seen_meta_) fail("\"__metadata__\" appears twice in the header");
          seen_meta_ = true;
        } else {
          entries.push_back(Entry{std::move(k), {}, {}, {}, false, false, false});
        }
        state_ = State::top_value;
        return;
      case State::meta:
        if (!meta_keys_.insert(k).second) fail(fmt::format("\"__metadata__\" has the key {} twice", quoted_name(k)));
        metadata.emplace_back(std::move(k), std::string{});
        state_ = State::meta_value;
        return;
      case State::entry: {
        Entry& e = entries.back();
        bool* seen = nullptr;
        if (k == "dtype") field_ = Field::dtype, seen = &e.has_dtype;
        else if (k == "shape") field_ = Field::shape, seen = &e.has_shape;
        else if (k == "data_offsets") field_ = Field::offsets, seen = &e.has_offsets;
        else field_ = Field::other;
        if (seen) {
          if (*seen) fail(fmt::format("{}: the entry has \"{}\" twice", tensor(), k));
          *seen = true;
        }
        state_ = State::entry_value;
        return;
      }
      default: return;  // keys arrive only in the states above
    }
  }

  State state_ = State::start;
  Field field_ = Field::other;
  bool is_meta_ = false, seen_meta_ = false;
  std::unordered_set<std::string> meta_keys_;
};

// A listed tensor and where its bytes start in its file.
struct Located {
  TensorInfo info;
  std::uint64_t offset;  // absolute file offset of the first byte
};

struct ParsedFile {
  std::vector<Located> tensors;
  std::vector<std::pair<std::string, std::string>> metadata;
};

// Reads and checks the header of one safetensors file.
ParsedFile parse_file(const RandomAccessFile& f, const std::string& origin) {
  const std::string& where = f.path();
  const std::uint64_t size = f.size();
  if (size < 8)
    throw usage_error(fmt::format("the file has {} bytes, fewer than the 8-byte header length a safetensors file "
                                  "starts with",
                                  size),
                      where, "the file is truncated or not a safetensors file");
  unsigned char len_bytes[8];
  f.read_at(0, len_bytes, 8);
  const std::uint64_t n = le64(len_bytes);
  if (n > size - 8)
    throw usage_error(fmt::format("the header length field says {} bytes but only {} bytes follow it", n, size - 8),
                      where, "the file is truncated or not a safetensors file");
  if (n > safetensors_max_header_bytes)
    throw usage_error(fmt::format("the header length field says {} bytes, more than the {} MiB lobit accepts", n,
                                  safetensors_max_header_bytes >> 20),
                      where, "the file is corrupt or not a safetensors file");
  if (n == 0)
    throw usage_error("the header length field is 0: there is no header", where,
                      "the file is corrupt or not a safetensors file");

  HeaderSax sax(where);
  {
    ChunkedText text(f, 8, 8 + n);
    json::sax_parse(text.begin(), text.end(), &sax);
  }
  const std::uint64_t data_begin = 8 + n, data_size = size - data_begin;
  const std::string corrupt = "the header and the data disagree; the file may be corrupt";

  ParsedFile out;
  out.metadata = std::move(sax.metadata);
  out.tensors.reserve(sax.entries.size());
  for (Entry& e : sax.entries) {
    const std::string who = "tensor " + quoted_name(e.name);
    const auto dtype = parse_safetensors_dtype(e.dtype);
    if (!dtype)
      throw usage_error(fmt::format("{}: dtype {} is not one lobit reads", who, quoted_name(e.dtype)), where,
                        "lobit reads the safetensors dtypes " + known_dtypes());
    const std::uint64_t begin = e.offsets[0], end = e.offsets[1];
    std::uint64_t count = 1, bytes = 0;
    bool overflow = false;
    for (std::uint64_t d : e.shape) overflow = overflow || mul_overflows(count, d, count);
    overflow = overflow || mul_overflows(count, static_cast<std::uint64_t>(dtype_bytes(*dtype)), bytes);
    if (overflow)
      throw usage_error(fmt::format("{}: {} {} needs more than 2^64 bytes", who, e.dtype, shape_text(e.shape)), where,
                        corrupt);
    if (begin > end)
      throw usage_error(fmt::format("{}: data_offsets [{}, {}] end before they begin", who, begin, end), where,
                        corrupt);
    if (end - begin != bytes)
      throw usage_error(fmt::format("{}: data_offsets [{}, {}] hold {} bytes but {} {} needs {}", who, begin, end,
                                    end - begin, e.dtype, shape_text(e.shape), bytes),
                        where, corrupt);
    if (end > data_size)
      throw usage_error(fmt::format("{}: data_offsets [{}, {}] pass the end of the data, which has {} bytes", who,
                                    begin, end, data_size),
                        where, "the file is truncated or its header is corrupt");
    Located l;
    l.info.name = std::move(e.name);
    l.info.file = where;
    l.info.dtype = *dtype;
    l.info.shape = std::move(e.shape);
    l.info.origin = origin;
    l.offset = data_begin + begin;
    out.tensors.push_back(std::move(l));
  }

  // Reduction axes recorded by `lobit quantize` ("lobit.axes.NAME" = "1,2,3"): the tensor's
  // axis hint, so that a quantized copy is scored and fitted along the axes it was made
  // with. A value that does not fit the tensor's rank is not a hint (the default applies).
  for (const auto& [key, value] : out.metadata) {
    constexpr std::string_view prefix = "lobit.axes.";
    if (key.rfind(prefix, 0) != 0) continue;
    const std::string name = key.substr(prefix.size());
    for (Located& l : out.tensors) {
      if (l.info.name != name) continue;
      AxisHint h;
      bool ok = !value.empty();
      std::size_t at = 0;
      while (ok && at <= value.size()) {
        const std::size_t comma = std::min(value.find(',', at), value.size());
        int axis = -1;
        const auto [p, ec] = std::from_chars(value.data() + at, value.data() + comma, axis);
        ok = ec == std::errc() && p == value.data() + comma && axis >= 0 &&
             axis < static_cast<int>(std::max<std::size_t>(l.info.shape.size(), 1)) &&
             (h.reduce.empty() || axis > h.reduce.back());
        if (ok) h.reduce.push_back(axis);
        at = comma + 1;
      }
      if (ok) {
        h.reason = "recorded by lobit quantize";
        l.info.axis_hint = std::move(h);
      }
    }
  }

  // Names are unique and byte ranges disjoint (empty tensors hold no bytes and cannot overlap).
  std::vector<std::size_t> order(out.tensors.size());
  for (std::size_t i = 0; i < order.size(); ++i) order[i] = i;
  std::sort(order.begin(), order.end(),
            [&](std::size_t a, std::size_t b) { return out.tensors[a].info.name < out.tensors[b].info.name; });
  for (std::size_t k = 1; k < order.size(); ++k)
    if (out.tensors[order[k]].info.name == out.tensors[order[k - 1]].info.name)
      throw usage_error(fmt::format("tensor {} appears twice in the header", quoted_name(out.tensors[order[k]].info.name)),
                        where, "the header is malformed; the file may be corrupt");
  std::erase_if(order, [&](std::size_t i) { return out.tensors[i].info.bytes() == 0; });
  std::sort(order.begin(), order.end(),
            [&](std::size_t a, std::size_t b) { return out.tensors[a].offset < out.tensors[b].offset; });
  for (std::size_t k = 1; k < order.size(); ++k) {
    const Located& a = out.tensors[order[k - 1]];
    const Located& b = out.tensors[order[k]];
    if (a.offset + a.info.bytes() > b.offset)
      throw usage_error(
          fmt::format("tensors {} (data_offsets [{}, {}]) and {} ([{}, {}]) overlap", quoted_name(a.info.name),
                      a.offset - data_begin, a.offset - data_begin + a.info.bytes(), quoted_name(b.info.name),
                      b.offset - data_begin, b.offset - data_begin + b.info.bytes()),
          where, corrupt);
  }
  return out;
}

// The index of a sharded checkpoint: {"weight_map": {tensor: shard}, ...}; other top-level
// keys ("metadata") are skipped.
class IndexSax final : public SaxBase {
 public:
  explicit IndexSax(std::string where) : SaxBase(std::move(where), "the index") {}
  std::vector<std::pair<std::string, std::uint32_t>> map;  // tensor, shard number
  std::vector<std::string> shards;                         // in order of first appearance
  bool has_map = false;

 private:
  enum class State { start, top, top_value, map, map_value, done };
  [[noreturn]] void fail(std::string what) const {
    throw usage_error(std::move(what), where_, "the index is malformed");
  }
  bool on_unsigned(std::uint64_t) override { return on_token(Token::unsigned_integer, 0, nullptr); }
  bool on_token(Token t, std::uint64_t, std::string* s) override {
    switch (state_) {
      case State::start:
        if (t != Token::object) fail(fmt::format("the index is {}, not a JSON object", token_text(t)));
        state_ = State::top;
        return true;
      case State::top: state_ = State::done; return true;
      case State::top_value:
        state_ = State::top;
        if (!in_map_key_) {
          skip_value(t);
          return true;
        }
        if (t != Token::object)
          fail(fmt::format("\"weight_map\" is {}, not an object of tensor names to shard files", token_text(t)));
        state_ = State::map;
        return true;
      case State::map: state_ = State::top; return true;  // end of the weight map
      case State::map_value: {
        if (t != Token::string)
          fail(fmt::format("\"weight_map\" maps tensor {} to {}, not a shard file name", quoted_name(map.back().first),
                           token_text(t)));
        const auto it = shard_index_.find(*s);
        if (it != shard_index_.end()) {
          map.back().second = it->second;
        } else {
          const auto k = static_cast<std::uint32_t>(shards.size());
          shard_index_.emplace(*s, k);
          shards.push_back(std::move(*s));
          map.back().second = k;
        }
        state_ = State::map;
        return true;
      }
      case State::done: return true;
    }
    return true;
  }
  void on_key(std::string& k) override {
    if (state_ == State::top) {
      in_map_key_ = k == "weight_map";
      if (in_map_key_) {
        if (has_map) fail("\"weight_map\" appears twice in the index");
        has_map = true;
      }
      state_ = State::top_value;
    } else if (state_ == State::map) {
      map.emplace_back(std::move(k), 0);
      state_ = State::map_value;
    }
  }
  State state_ = State::start;
  bool in_map_key_ = false;
  std::unordered_map<std::string, std::uint32_t> shard_index_;
};

class SafetensorsCheckpoint final : public Checkpoint {
 public:
  SafetensorsCheckpoint(std::string path, std::vector<std::shared_ptr<const RandomAccessFile>> files,
                        std::vector<std::pair<std::size_t, std::uint64_t>> where, std::vector<TensorInfo> tensors)
      : path_(std::move(path)), files_(std::move(files)), where_(std::move(where)) {
    tensors_ = std::move(tensors);
  }
  const std::string& path() const override { return path_; }
  std::string_view kind() const override { return "safetensors"; }

 protected:
  Extent locate(std::size_t i) const override {
    const auto& [file, offset] = where_.at(i);
    return Extent{files_[file], nullptr, offset};
  }

 private:
  std::string path_;
  std::vector<std::shared_ptr<const RandomAccessFile>> files_;
  std::vector<std::pair<std::size_t, std::uint64_t>> where_;  // file number, absolute offset
};

// Whether a shard name from an index is a path below the index's folder.
bool is_relative_below(const std::string& s) {
  if (s.empty() || s[0] == '/' || s.find('\0') != std::string::npos) return false;
  for (const auto& part : std::filesystem::path(s))
    if (part == "..") return false;
  return true;
}

std::unique_ptr<Checkpoint> open_index(const std::string& path, const RandomAccessFile& index_file) {
  const std::uint64_t size = index_file.size();
  if (size > safetensors_max_index_bytes)
    throw usage_error(fmt::format("the index has {} bytes, more than the {} MiB lobit accepts", size,
                                  safetensors_max_index_bytes >> 20),
                      path, "give a .safetensors file or the index .json of a sharded checkpoint");
  IndexSax sax(path);
  {
    ChunkedText text(index_file, 0, size);
    json::sax_parse(text.begin(), text.end(), &sax);
  }
  if (!sax.has_map)
    throw usage_error("the JSON file has no \"weight_map\", so it is not a sharded safetensors index", path,
                      "give a .safetensors file or the index .json of a sharded checkpoint");
  if (sax.map.empty()) throw usage_error("the index's \"weight_map\" lists no tensors", path, "the index is empty");

  const std::filesystem::path folder = std::filesystem::path(path).parent_path();
  std::vector<std::shared_ptr<const RandomAccessFile>> files;
  std::vector<ParsedFile> parsed;
  for (const std::string& shard : sax.shards) {
    if (!is_relative_below(shard))
      throw usage_error(fmt::format("the index names the shard {}, which is not a file name in or below the "
                                    "index's folder",
                                    quoted_name(shard)),
                        path, "shard names are relative to the index; absolute paths and '..' are refused");
    const std::string shard_path = (folder / shard).string();
    try {
      files.push_back(std::make_shared<const RandomAccessFile>(shard_path));
    } catch (const Error& e) {
      throw usage_error(fmt::format("the shard {} named by the index cannot be read: {}", quoted_name(shard), e.message()),
                        path, "the checkpoint is incomplete or the index is in the wrong folder");
    }
    parsed.push_back(parse_file(*files.back(), "safetensors shard"));
  }

  // Every mapped tensor is in the shard the map names.
  std::vector<std::unordered_map<std::string_view, std::size_t>> by_name(parsed.size());
  for (std::size_t s = 0; s < parsed.size(); ++s)
    for (std::size_t k = 0; k < parsed[s].tensors.size(); ++k) by_name[s].emplace(parsed[s].tensors[k].info.name, k);
  std::vector<std::vector<bool>> mapped(parsed.size());
  for (std::size_t s = 0; s < parsed.size(); ++s) mapped[s].assign(parsed[s].tensors.size(), false);
  {
    std::unordered_set<std::string_view> names;
    for (const auto& [name, s] : sax.map) {
      if (!names.insert(name).second)
        throw usage_error(fmt::format("the index maps tensor {} twice", quoted_name(name)), path, "the index is malformed");
      const auto it = by_name[s].find(name);
      if (it == by_name[s].end())
        throw usage_error(fmt::format("the index maps tensor {} to the shard {}, which has no such tensor",
                                      quoted_name(name), quoted_name(sax.shards[s])),
                          path, "the index and its shards do not match; the checkpoint may be incomplete");
      mapped[s][it->second] = true;
    }
  }

  // Every tensor of every shard is listed; a name may appear in one shard only.
  std::vector<TensorInfo> tensors;
  std::vector<std::pair<std::size_t, std::uint64_t>> where;
  std::unordered_map<std::string, std::size_t> shard_of;
  for (std::size_t s = 0; s < parsed.size(); ++s) {
    for (std::size_t k = 0; k < parsed[s].tensors.size(); ++k) {
      Located& l = parsed[s].tensors[k];
      const auto [it, fresh] = shard_of.emplace(l.info.name, s);
      if (!fresh)
        throw usage_error(fmt::format("tensor {} is in both shard {} and shard {}", quoted_name(l.info.name),
                                      quoted_name(sax.shards[it->second]), quoted_name(sax.shards[s])),
                          path, "the shards do not belong to one checkpoint");
      if (!mapped[s][k]) l.info.origin = "safetensors shard (not in the index's weight_map)";
      tensors.push_back(std::move(l.info));
      where.emplace_back(s, l.offset);
    }
  }
  return std::make_unique<SafetensorsCheckpoint>(path, std::move(files), std::move(where), std::move(tensors));
}

// The first bytes of a JSON text: no control characters but whitespace, starting with '{'
// (after whitespace). A safetensors file starts with a length whose high bytes are zero.
bool looks_like_json_object(const unsigned char* head, std::size_t n) {
  bool seen_brace = false;
  for (std::size_t i = 0; i < n; ++i) {
    const unsigned char c = head[i];
    if (!seen_brace) {
      if (c == '{') seen_brace = true;
      else if (c != ' ' && c != '\t' && c != '\n' && c != '\r') return false;
    } else if (c < 0x20 && c != '\t' && c != '\n' && c != '\r') {
      return false;
    }
  }
  return seen_brace;
}

}  // namespace

std::string_view write_dtype_name(DType t) {
  for (const auto& d : kDTypeNames)
    if (d.dtype == t) return d.name;
  throw usage_error(fmt::format("safetensors has no dtype for {}", dtype_name(t)), "safetensors writer",
                    "store it as its bit patterns (U8) or convert it to a type safetensors has");
}

std::optional<DType> parse_safetensors_dtype(std::string_view s) {
  for (const auto& d : kDTypeNames)
    if (d.name == s) return d.dtype;
  return std::nullopt;
}

bool looks_like_safetensors(const unsigned char* head, std::size_t n, std::uint64_t file_size) {
  if (n < 9 || file_size < 9) return false;
  const std::uint64_t len = le64(head);
  return len >= 2 && len <= file_size - 8 && head[8] == '{';
}

std::unique_ptr<Checkpoint> open_safetensors(const std::string& path) {
  auto file = std::make_shared<const RandomAccessFile>(path);
  unsigned char head[16] = {};
  const std::size_t n = static_cast<std::size_t>(std::min<std::uint64_t>(sizeof head, file->size()));
  file->read_at(0, head, n);
  if (!looks_like_safetensors(head, n, file->size()) && looks_like_json_object(head, n))
    return open_index(path, *file);
  ParsedFile parsed = parse_file(*file, "safetensors header");
  std::vector<TensorInfo> tensors;
  std::vector<std::pair<std::size_t, std::uint64_t>> where;
  tensors.reserve(parsed.tensors.size());
  where.reserve(parsed.tensors.size());
  for (Located& l : parsed.tensors) {
    tensors.push_back(std::move(l.info));
    where.emplace_back(0, l.offset);
  }
  return std::make_unique<SafetensorsCheckpoint>(path, std::vector{std::move(file)}, std::move(where),
                                                 std::move(tensors));
}

namespace {

// The padded header bytes (length field included) for a plan; sets data_bytes.
std::string build_header(const std::string& path, const std::vector<PlannedTensor>& plan,
                         const std::vector<std::pair<std::string, std::string>>& metadata, std::uint64_t& data_bytes) {
  auto str = [&](const std::string& s) {
    try {
      return json(s).dump();
    } catch (const json::exception&) {
      throw usage_error(fmt::format("the name {} is not valid UTF-8", quoted_name(s)), path,
                        "safetensors headers are UTF-8 JSON");
    }
  };
  std::string text = "{";
  if (!metadata.empty()) {
    text += "\"__metadata__\":{";
    std::unordered_set<std::string_view> keys;
    for (std::size_t i = 0; i < metadata.size(); ++i) {
      if (!keys.insert(metadata[i].first).second)
        throw usage_error(fmt::format("metadata key {} is given twice", quoted_name(metadata[i].first)), path);
      text += (i ? "," : "") + str(metadata[i].first) + ":" + str(metadata[i].second);
    }
    text += "}";
  }
  std::unordered_set<std::string_view> names;
  std::uint64_t offset = 0;
  for (const PlannedTensor& t : plan) {
    if (t.name == "__metadata__")
      throw usage_error("\"__metadata__\" is reserved and cannot name a tensor", path, "rename the tensor");
    if (!names.insert(t.name).second)
      throw usage_error(fmt::format("tensor {} is planned twice", quoted_name(t.name)), path, "tensor names must be unique");
    if (t.shape.size() > safetensors_max_rank)
      throw usage_error(fmt::format("tensor {} has {} axes, more than {}", quoted_name(t.name), t.shape.size(),
                                    safetensors_max_rank),
                        path);
    const std::string_view dname = write_dtype_name(t.dtype);
    std::uint64_t count = 1, bytes = 0, end = 0;
    bool overflow = false;
    for (std::uint64_t d : t.shape) overflow = overflow || mul_overflows(count, d, count);
    overflow = overflow || mul_overflows(count, static_cast<std::uint64_t>(dtype_bytes(t.dtype)), bytes);
    overflow = overflow || __builtin_add_overflow(offset, bytes, &end);
    if (overflow)
      throw usage_error(fmt::format("tensor {} {} makes the data larger than 2^64 bytes", quoted_name(t.name),
                                    shape_text(t.shape)),
                        path);
    text += (text.size() > 1 ? "," : "") + str(t.name) + ":{\"dtype\":\"" + std::string(dname) + "\",\"shape\":[";
    text += fmt::format("{}", fmt::join(t.shape, ","));
    text += fmt::format("],\"data_offsets\":[{},{}]}}", offset, end);
    offset = end;
  }
  text += "}";
  // Spaces so the data starts at a multiple of 8 bytes (common practice of the format).
  text.append((8 - text.size() % 8) % 8, ' ');
  if (text.size() > safetensors_max_header_bytes)
    throw usage_error(fmt::format("the header would have {} bytes, more than the {} MiB readers accept", text.size(),
                                  safetensors_max_header_bytes >> 20),
                      path, "write fewer tensors per file");
  data_bytes = offset;
  std::string out(8, '\0');
  std::uint64_t len = text.size();
  for (int i = 0; i < 8; ++i, len >>= 8) out[static_cast<std::size_t>(i)] = static_cast<char>(len & 0xff);
  return out + text;
}

}  // namespace

SafetensorsWriter::SafetensorsWriter(std::string path, std::vector<PlannedTensor> plan,
                                     std::vector<std::pair<std::string, std::string>> metadata)
    : header_(build_header(path, plan, metadata, data_bytes_)),
      out_(std::move(path), header_, data_bytes_, "the plan") {}

void SafetensorsWriter::write(const void* data, std::uint64_t nbytes) { out_.write(data, nbytes); }

void SafetensorsWriter::commit() {
  out_.commit();
}

}  // namespace lobit::io
