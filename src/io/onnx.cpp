// ONNX model files as checkpoints.
//
// Why a hand-written reader: the ONNX and protobuf libraries parse a whole ModelProto
// into memory (and protobuf refuses messages over 2 GB), which breaks lobit's bounded
// memory rule for large models. The protobuf wire format is simple enough to walk
// directly: tags and lengths are read with positioned reads into a small buffer
// (protobuf_wire.hpp), each tensor's raw_data is recorded as a file offset and read in
// place later, and everything else (node lists aside) is skipped without being read.
//
// Field numbers are those of onnx.proto, written from memory and checked against the
// test models (silero-vad, PP-OCR): see the constants below.
#include "lobit/io/onnx.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <filesystem>
#include <map>
#include <mutex>
#include <optional>
#include <unordered_map>
#include <unordered_set>
#include <vector>

#include "lobit/error.hpp"
#include "protobuf_wire.hpp"

namespace lobit::io {
namespace {

namespace fs = std::filesystem;
using pb::Field;
using pb::Wire;
using pb::WireReader;

// --- onnx.proto field numbers (from memory) ---
namespace model_f {
constexpr std::uint32_t ir_version = 1, graph = 7;
}
namespace graph_f {
constexpr std::uint32_t node = 1, initializer = 5, input = 11, sparse_initializer = 15;
}
namespace node_f {
constexpr std::uint32_t input = 1, output = 2, name = 3, op_type = 4, attribute = 5, domain = 7;
}
namespace attr_f {
constexpr std::uint32_t name = 1, i = 3, t = 5, g = 6, ints = 8, graphs = 11;
}
namespace tensor_f {
constexpr std::uint32_t dims = 1, data_type = 2, float_data = 4, int32_data = 5, string_data = 6, int64_data = 7,
                        name = 8, raw_data = 9, double_data = 10, uint64_data = 11, external_data = 13,
                        data_location = 14;
}
namespace entry_f {  // StringStringEntryProto
constexpr std::uint32_t key = 1, value = 2;
}
namespace value_info_f {
constexpr std::uint32_t name = 1;
}
namespace sparse_f {  // SparseTensorProto
constexpr std::uint32_t values = 1;
}
constexpr std::uint64_t location_external = 1;  // TensorProto.DataLocation.EXTERNAL

constexpr std::size_t max_string = 64 * 1024;  // names, op types, keys: longer is corrupt
constexpr int max_graph_depth = 64;            // subgraphs within subgraphs
constexpr std::size_t max_rank = 64;
constexpr std::size_t chunk_bytes = 1 << 16;   // decode buffer

// --- element types ---

struct OnnxType {
  int number;
  std::optional<DType> dtype;  // empty: not read by lobit
  std::string_view name;
};
// TensorProto.DataType (from memory; 17-20 are the float8 types of ONNX 1.14, 21-23 the
// 4-bit types of 1.16).
constexpr OnnxType onnx_types[] = {
    {0, std::nullopt, "undefined"},
    {1, DType::f32, "float32"},
    {2, DType::u8, "uint8"},
    {3, DType::i8, "int8"},
    {4, DType::u16, "uint16"},
    {5, DType::i16, "int16"},
    {6, DType::i32, "int32"},
    {7, DType::i64, "int64"},
    {8, std::nullopt, "string"},
    {9, DType::boolean, "bool"},
    {10, DType::f16, "float16"},
    {11, DType::f64, "float64"},
    {12, DType::u32, "uint32"},
    {13, DType::u64, "uint64"},
    {14, std::nullopt, "complex64"},
    {15, std::nullopt, "complex128"},
    {16, DType::bf16, "bfloat16"},
    {17, DType::f8_e4m3, "float8 e4m3"},
    {18, DType::f8_e4m3_nz, "float8 e4m3 (bias 8, no negative zero)"},
    {19, DType::f8_e5m2, "float8 e5m2"},
    {20, DType::f8_e5m2_nz, "float8 e5m2 (bias 16, no negative zero)"},
    {21, std::nullopt, "4-bit unsigned integer"},
    {22, std::nullopt, "4-bit signed integer"},
    {23, std::nullopt, "4-bit float e2m1"},
};

const OnnxType* find_type(std::uint64_t number) {
  for (const auto& t : onnx_types)
    if (static_cast<std::uint64_t>(t.number) == number) return &t;
  return nullptr;
}

// The typed (non-raw) data fields and the element types each may hold (onnx.proto's
// comments on the fields, from memory).
enum class DataField : std::uint8_t { none, raw, float_data, int32_data, int64_data, double_data, uint64_data, external };

std::string_view field_name(DataField f) {
  switch (f) {
    case DataField::none: return "no data";
    case DataField::raw: return "raw_data";
    case DataField::float_data: return "float_data";
    case DataField::int32_data: return "int32_data";
    case DataField::int64_data: return "int64_data";
    case DataField::double_data: return "double_data";
    case DataField::uint64_data: return "uint64_data";
    case DataField::external: return "external data";
  }
  return "?";
}

std::uint32_t field_number(DataField f) {
  switch (f) {
    case DataField::float_data: return tensor_f::float_data;
    case DataField::int32_data: return tensor_f::int32_data;
    case DataField::int64_data: return tensor_f::int64_data;
    case DataField::double_data: return tensor_f::double_data;
    case DataField::uint64_data: return tensor_f::uint64_data;
    default: return 0;
  }
}

bool field_holds(DataField f, DType t) {
  switch (f) {
    case DataField::float_data: return t == DType::f32;
    case DataField::double_data: return t == DType::f64;
    case DataField::int64_data: return t == DType::i64;
    case DataField::uint64_data: return t == DType::u32 || t == DType::u64;
    case DataField::int32_data:
      return t == DType::i32 || t == DType::i16 || t == DType::i8 || t == DType::u16 || t == DType::u8 ||
             t == DType::boolean || t == DType::f16 || t == DType::bf16 || t == DType::f8_e4m3 ||
             t == DType::f8_e4m3_nz || t == DType::f8_e5m2 || t == DType::f8_e5m2_nz;
    default: return true;
  }
}

std::string_view field_purpose(DataField f) {
  switch (f) {
    case DataField::float_data: return "float32 tensors";
    case DataField::double_data: return "float64 tensors";
    case DataField::int64_data: return "int64 tensors";
    case DataField::uint64_data: return "uint32 and uint64 tensors";
    case DataField::int32_data: return "int32, int16, int8, uint16, uint8, bool, float16, bfloat16 and float8 tensors";
    default: return "";
  }
}

// Fixed-width fields: bytes per element on the wire (0 for varint fields).
int wire_width(DataField f) {
  return f == DataField::float_data ? 4 : f == DataField::double_data ? 8 : 0;
}



constexpr std::string_view hint_damaged = "the file is damaged or was written by a faulty exporter";

// --- where each tensor's elements are ---

struct Layout {
  DataField field = DataField::none;
  std::uint64_t msg_begin = 0, msg_end = 0;  // the TensorProto in the model file
  bool direct = false;                       // contiguous little-endian elements at `offset`
  std::uint64_t offset = 0;
  std::string external_path;                 // field == external: the file (already validated)
};

// Decodes the elements of a tensor held in a typed field (varints or unpacked fixed
// values, possibly in several records) to little-endian bytes of the tensor's dtype, in
// bounded chunks handed to `sink(bytes, n)`. Checks every value against the dtype's range.
// Returns the element count.
template <class Sink>
std::uint64_t decode_typed(const RandomAccessFile& file, const Layout& l, DType dtype, const std::string& tensor,
                           Sink&& sink) {
  const std::uint32_t number = field_number(l.field);
  const int out_bytes = dtype_bytes(dtype);
  std::vector<unsigned char> buf;
  buf.reserve(chunk_bytes + 8);
  std::uint64_t count = 0;
  auto flush = [&] {
    if (!buf.empty()) sink(buf.data(), buf.size());
    buf.clear();
  };
  auto put = [&](std::uint64_t bits) {
    for (int b = 0; b < out_bytes; ++b) buf.push_back(static_cast<unsigned char>(bits >> (8 * b)));
    ++count;
    if (buf.size() >= chunk_bytes) flush();
  };
  auto bad_value = [&](std::int64_t v) {
    throw usage_error(fmt::format("tensor {}: {} element {} is {}, outside the range of {}", quoted_name(tensor),
                                  field_name(l.field), count, v, dtype_name(dtype)),
                      file.path(), std::string(hint_damaged));
  };
  // Varint fields: the integer the wire holds, checked against the element type.
  auto put_varint = [&](std::uint64_t v) {
    switch (l.field) {
      case DataField::int32_data: {
        // protobuf int32: the low 32 bits, as two's complement (negative values are
        // written sign-extended to 64 bits).
        const std::int64_t x = static_cast<std::int32_t>(static_cast<std::uint32_t>(v));
        std::int64_t lo = 0, hi = 0;
        switch (dtype) {
          case DType::i32: lo = INT32_MIN, hi = INT32_MAX; break;
          case DType::i16: lo = -32768, hi = 32767; break;
          case DType::i8: lo = -128, hi = 127; break;
          case DType::boolean: lo = 0, hi = 1; break;
          case DType::u8: case DType::f8_e4m3: case DType::f8_e4m3_nz: case DType::f8_e5m2: case DType::f8_e5m2_nz:
            lo = 0, hi = 255; break;
          default: lo = 0, hi = 65535; break;  // uint16 and the 16-bit floats' bit patterns
        }
        if (x < lo || x > hi) bad_value(x);
        put(static_cast<std::uint64_t>(x));
        break;
      }
      case DataField::uint64_data:
        if (dtype == DType::u32 && v > 0xffffffffu) bad_value(static_cast<std::int64_t>(v));
        put(v);
        break;
      default:  // int64_data: two's complement as written
        put(v);
    }
  };
  WireReader r(file, l.msg_begin, l.msg_end);
  Field f;
  while (r.next(f)) {
    if (f.number != number) continue;
    const int width = wire_width(l.field);
    if (width == 0) {
      if (f.wire == Wire::varint)
        put_varint(f.value);
      else if (f.wire == Wire::bytes)
        pb::for_each_packed_varint(file, f.offset, f.length, put_varint);
      else
        r.fail(f.tag_offset, fmt::format("{} of tensor {} has the wire type of a fixed-width field",
                                         field_name(l.field), quoted_name(tensor)));
    } else {
      const Wire unpacked = width == 4 ? Wire::fixed32 : Wire::fixed64;
      if (f.wire == unpacked) {
        put(f.value);
      } else if (f.wire == Wire::bytes) {
        // Packed fixed-width values are already little-endian elements.
        flush();
        std::vector<unsigned char> part(chunk_bytes);
        for (std::uint64_t done = 0; done < f.length;) {
          const std::uint64_t n = std::min<std::uint64_t>(chunk_bytes, f.length - done);
          file.read_at(f.offset + done, part.data(), n);
          sink(part.data(), static_cast<std::size_t>(n));
          done += n;
        }
        count += f.length / static_cast<std::uint64_t>(width);
      } else {
        r.fail(f.tag_offset, fmt::format("{} of tensor {} has wire type {}", field_name(l.field), quoted_name(tensor),
                                         static_cast<int>(f.wire)));
      }
    }
  }
  flush();
  return count;
}

// --- the checkpoint ---

class OnnxCheckpoint final : public Checkpoint {
 public:
  OnnxCheckpoint(std::string path, std::shared_ptr<const RandomAccessFile> file, std::vector<TensorInfo> tensors,
                 std::vector<Layout> layouts)
      : path_(std::move(path)), file_(std::move(file)), layouts_(std::move(layouts)) {
    tensors_ = std::move(tensors);
    decoded_.resize(layouts_.size());
  }
  const std::string& path() const override { return path_; }
  std::string_view kind() const override { return "onnx"; }

 protected:
  Extent locate(std::size_t i) const override {
    const Layout& l = layouts_.at(i);
    if (l.direct) return Extent{file_, nullptr, l.offset};
    std::lock_guard lock(mu_);
    if (l.field == DataField::external) return Extent{external_file(l.external_path), nullptr, l.offset};
    if (!decoded_[i]) decoded_[i] = decode(i);
    return Extent{nullptr, scratch_, *decoded_[i]};
  }

 private:
  // Varint and unpacked fields: decoded once into the scratch file (under mu_).
  std::uint64_t decode(std::size_t i) const {
    if (!scratch_) scratch_ = std::make_shared<ScratchFile>();
    const TensorInfo& t = tensors_[i];
    std::optional<std::uint64_t> start;
    std::uint64_t written = 0;
    const std::uint64_t n = decode_typed(*file_, layouts_[i], t.dtype, t.name, [&](const unsigned char* p, std::size_t k) {
      const std::uint64_t at = scratch_->append(p, k);
      if (!start) start = at;
      if (at != *start + written)
        throw Error(Error::Kind::internal, "scratch file appended out of order", path_);
      written += k;
    });
    if (n != t.count() || written != t.bytes())
      throw Error(Error::Kind::internal,
                  fmt::format("tensor {}: decoded {} elements, expected {}", quoted_name(t.name), n, t.count()), path_);
    return start.value_or(0);
  }

  // External data files, opened on first use; at most 64 stay open.
  std::shared_ptr<const RandomAccessFile> external_file(const std::string& p) const {
    auto it = external_.find(p);
    if (it != external_.end()) return it->second;
    if (external_.size() >= 64) external_.clear();  // readers still hold what they use
    auto f = std::make_shared<const RandomAccessFile>(p);
    external_.emplace(p, f);
    return f;
  }

  std::string path_;
  std::shared_ptr<const RandomAccessFile> file_;
  std::vector<Layout> layouts_;
  mutable std::mutex mu_;
  mutable std::shared_ptr<ScratchFile> scratch_;
  mutable std::vector<std::optional<std::uint64_t>> decoded_;
  mutable std::map<std::string, std::shared_ptr<const RandomAccessFile>> external_;
};

// --- the graph, as far as the axis hints need it ---

struct Node {
  std::string op_type, name, domain;
  std::vector<std::string> inputs, outputs;
  std::int64_t trans_a = 0, trans_b = 0;
  bool has_perm = false, perm_ok = true;
  std::vector<std::int64_t> perm;
  std::vector<std::size_t> subgraphs;  // into Model::graphs
};

struct Graph {
  std::string origin_suffix;         // "" or " in subgraph If 'x'/then_branch > Loop 'y'/body"
  std::vector<std::string> steps;    // qualified-name steps: {"x", "then_branch", "y", "body"}
  std::vector<Node> nodes;
  std::vector<std::size_t> children;      // subgraphs of its nodes, into Model::graphs
  std::unordered_set<std::string> binds;  // names this graph defines (shadowing the outer ones)
  std::unordered_map<std::string, std::vector<std::pair<std::size_t, std::size_t>>> uses;  // name -> (node, input)
};

bool default_domain(const std::string& d) { return d.empty() || d == "ai.onnx"; }

std::string node_label(const Node& n, std::size_t index) {
  return n.name.empty() ? fmt::format("{} #{}", n.op_type, index) : fmt::format("{} '{}'", n.op_type, n.name);
}

// --- reading the model ---

struct PendingTensor {
  std::string name;
  bool has_name = false;
  std::vector<std::uint64_t> dims;
  std::uint64_t data_type = 0;
  std::uint64_t msg_begin = 0, msg_end = 0;
  std::optional<Field> raw;
  std::uint64_t data_location = 0;
  bool has_external_entries = false;
  std::map<std::string, std::string> external;
  bool has_strings = false;
  // Typed fields: records seen, fixed-width elements (unpacked + packed), the one packed record.
  struct Typed {
    std::uint64_t records = 0, unpacked = 0, packed_bytes = 0;
    std::optional<Field> first_packed;
  };
  std::map<DataField, Typed> typed;
};

class ModelReader {
 public:
  explicit ModelReader(std::string path)
      : path_(std::move(path)), file_(std::make_shared<const RandomAccessFile>(path_)),
        dir_(fs::path(path_).parent_path()) {}

  std::unique_ptr<Checkpoint> read() {
    WireReader r(*file_, 0, file_->size());
    Field f;
    bool graph = false;
    while (r.next(f)) {
      if (f.number != model_f::graph) continue;
      if (f.wire != Wire::bytes) r.fail(f.tag_offset, "the model's graph field is not a message");
      if (!graph) graphs_.emplace_back();
      graph = true;  // a repeated message field is merged: both parts form the main graph
      r.enter(f);
      walk_graph(r, 0, 0);
      r.leave();
    }
    if (!graph)
      throw usage_error("not an ONNX model: there is no graph", path_,
                        "give an .onnx model file (a ModelProto with a graph)");
    add_hints();
    return std::make_unique<OnnxCheckpoint>(path_, file_, std::move(tensors_), std::move(layouts_));
  }

 private:
  // --- walk ---

  void walk_graph(WireReader& r, std::size_t g, int depth) {
    Field f;
    std::size_t node_index = graphs_[g].nodes.size();
    while (r.next(f)) {
      switch (f.number) {
        case graph_f::node:
          r.enter(f);
          walk_node(r, g, node_index++, depth);
          r.leave();
          break;
        case graph_f::initializer: {
          const PendingTensor t = read_tensor(r, f, std::nullopt);
          add_tensor(g, t, t.name, "initializer");
          break;
        }
        case graph_f::input: {
          r.enter(f);
          Field v;
          while (r.next(v))
            if (v.number == value_info_f::name) graphs_[g].binds.insert(r.string(v, max_string));
          r.leave();
          break;
        }
        case graph_f::sparse_initializer:
          throw usage_error(fmt::format("{} is a sparse initializer, which lobit does not read", sparse_name(r, f)),
                            path_, "store the tensor dense (as an initializer) to measure it");
        default:
          break;
      }
    }
  }

  std::string sparse_name(WireReader& r, const Field& f) {
    r.enter(f);
    Field v;
    std::string name;
    while (r.next(v)) {
      if (v.number != sparse_f::values || v.wire != Wire::bytes) continue;
      r.enter(v);
      Field n;
      while (r.next(n))
        if (n.number == tensor_f::name) name = r.string(n, max_string);
      r.leave();
    }
    r.leave();
    return name.empty() ? fmt::format("the tensor at byte {}", f.offset) : fmt::format("tensor {}", quoted_name(name));
  }

  void walk_node(WireReader& r, std::size_t g, std::size_t index, int depth) {
    Node n;
    std::vector<Field> attributes;
    Field f;
    while (r.next(f)) {
      switch (f.number) {
        case node_f::input: n.inputs.push_back(r.string(f, max_string)); break;
        case node_f::output: n.outputs.push_back(r.string(f, max_string)); break;
        case node_f::name: n.name = r.string(f, max_string); break;
        case node_f::op_type: n.op_type = r.string(f, max_string); break;
        case node_f::domain: n.domain = r.string(f, max_string); break;
        case node_f::attribute:
          if (f.wire != Wire::bytes) r.fail(f.tag_offset, "a node attribute is not a message");
          attributes.push_back(f);
          break;
        default: break;
      }
    }
    for (const auto& o : n.outputs) graphs_[g].binds.insert(o);
    const bool constant = n.op_type == "Constant" && default_domain(n.domain);
    for (const Field& a : attributes) {
      r.enter(a);
      walk_attribute(r, g, n, index, constant, depth);
      r.leave();
    }
    Graph& graph = graphs_[g];
    for (std::size_t k = 0; k < n.inputs.size(); ++k)
      if (!n.inputs[k].empty()) graph.uses[n.inputs[k]].emplace_back(graph.nodes.size(), k);
    graph.nodes.push_back(std::move(n));
  }

  void walk_attribute(WireReader& r, std::size_t g, Node& n, std::size_t index, bool constant, int depth) {
    std::string name;
    std::optional<Field> tensor;
    std::vector<std::pair<Field, int>> subgraphs;  // (field, k) with k = -1 for a single graph
    std::optional<std::int64_t> i;
    std::vector<std::int64_t> ints;
    bool ints_ok = true;
    int listed = 0;
    auto add_int = [&](std::uint64_t v) {
      if (ints.size() < max_rank) ints.push_back(static_cast<std::int64_t>(v));
      else ints_ok = false;
    };
    Field f;
    while (r.next(f)) {
      switch (f.number) {
        case attr_f::name: name = r.string(f, max_string); break;
        case attr_f::i:
          if (f.wire == Wire::varint) i = static_cast<std::int64_t>(f.value);
          break;
        case attr_f::ints:
          if (f.wire == Wire::varint) {
            add_int(f.value);
          } else if (f.wire == Wire::bytes) {
            r.enter(f);
            while (r.position() < r.limit()) add_int(r.varint());
            r.leave();
          }
          break;
        case attr_f::t:
          if (f.wire != Wire::bytes) r.fail(f.tag_offset, "an attribute tensor is not a message");
          tensor = f;  // a singular field: the last one counts
          break;
        case attr_f::g:
          subgraphs.emplace_back(f, -1);
          break;
        case attr_f::graphs:
          subgraphs.emplace_back(f, listed++);
          break;
        default: break;
      }
    }
    if (name == "transA" && i) n.trans_a = *i;
    if (name == "transB" && i) n.trans_b = *i;
    if (name == "perm") {
      n.has_perm = true;
      n.perm = ints;
      n.perm_ok = ints_ok;
    }
    if (constant && name == "sparse_value")
      throw usage_error(fmt::format("tensor {} (Constant node{}) is sparse, which lobit does not read",
                                    quoted_name(n.outputs.empty() ? std::string() : n.outputs[0]), graphs_[g].origin_suffix),
                        path_, "store the tensor dense to measure it");
    if (constant && name == "value" && tensor) {
      if (n.outputs.empty() || n.outputs[0].empty())
        r.fail(tensor->tag_offset, "a Constant node has no output name");
      const PendingTensor t = read_tensor(r, *tensor, n.outputs[0]);
      add_tensor(g, t, n.outputs[0], "Constant node");
    }
    for (const auto& [sf, k] : subgraphs) {
      if (sf.wire != Wire::bytes) r.fail(sf.tag_offset, "an attribute graph is not a message");
      if (depth + 1 > max_graph_depth)
        r.fail(sf.tag_offset, fmt::format("subgraphs nested deeper than {}", max_graph_depth));
      const std::string attr = k < 0 ? name : fmt::format("{}[{}]", name, k);
      Graph sub;
      const std::string shown_node = node_label(n, index);
      sub.origin_suffix = graphs_[g].origin_suffix.empty()
                              ? fmt::format(" in subgraph {}/{}", shown_node, attr)
                              : fmt::format("{} > {}/{}", graphs_[g].origin_suffix, shown_node, attr);
      sub.steps = graphs_[g].steps;
      sub.steps.push_back(n.name.empty() ? fmt::format("{}#{}", n.op_type, index) : n.name);
      sub.steps.push_back(attr);
      const std::size_t s = graphs_.size();
      graphs_.push_back(std::move(sub));
      n.subgraphs.push_back(s);
      graphs_[g].children.push_back(s);
      r.enter(sf);
      walk_graph(r, s, depth + 1);
      r.leave();
    }
  }

  // --- tensors ---

  // Reads a TensorProto's fields (no element is read). `known_name`: the Constant node's
  // output, the tensor's name in the graph.
  PendingTensor read_tensor(WireReader& r, const Field& msg, const std::optional<std::string>& known_name) {
    PendingTensor t;
    t.msg_begin = msg.offset;
    t.msg_end = msg.end();
    if (known_name) t.name = *known_name, t.has_name = true;
    try {
      r.enter(msg);
      Field f;
      while (r.next(f)) read_tensor_field(r, f, t, known_name.has_value());
      r.leave();
    } catch (const Error& e) {
      if (!t.has_name) name_after_error(msg, t);
      const std::string who = t.has_name ? fmt::format("tensor {}", quoted_name(t.name))
                                         : fmt::format("the tensor at byte {}", msg.offset);
      throw Error(e.kind(), fmt::format("{}: {}", who, e.what()), e.where(), e.hint());
    }
    return t;
  }

  // After an error inside a TensorProto that came before its name: the name, if the
  // message's fields can still be walked up to it.
  void name_after_error(const Field& msg, PendingTensor& t) const {
    try {
      WireReader r(*file_, msg.offset, msg.end());
      Field f;
      while (r.next(f))
        if (f.number == tensor_f::name) {
          t.name = r.string(f, max_string);
          t.has_name = true;
        }
    } catch (const Error&) {
      // The corruption hides the name.
    }
  }

  void add_dim(WireReader& r, PendingTensor& t, std::uint64_t v, std::uint64_t at) {
    if (t.dims.size() >= max_rank) r.fail(at, fmt::format("more than {} dims", max_rank));
    if (v > static_cast<std::uint64_t>(INT64_MAX))
      r.fail(at, fmt::format("negative dimension {}", static_cast<std::int64_t>(v)));
    t.dims.push_back(v);
  }

  void read_tensor_field(WireReader& r, const Field& f, PendingTensor& t, bool name_known) {
    auto typed = [&](DataField which) {
      auto& d = t.typed[which];
      ++d.records;
      const int width = wire_width(which);
      if (f.wire == Wire::bytes) {
        if (width > 0) {
          if (f.length % static_cast<std::uint64_t>(width) != 0)
            r.fail(f.tag_offset, fmt::format("packed {} of {} bytes, not a multiple of {}", field_name(which),
                                             f.length, width));
          d.packed_bytes += f.length;
          if (!d.first_packed) d.first_packed = f;
        }
      } else if (width == 0 ? f.wire == Wire::varint : f.wire == (width == 4 ? Wire::fixed32 : Wire::fixed64)) {
        ++d.unpacked;
      } else {
        r.fail(f.tag_offset, fmt::format("{} has wire type {}", field_name(which), static_cast<int>(f.wire)));
      }
    };
    switch (f.number) {
      case tensor_f::dims:
        if (f.wire == Wire::varint) {
          add_dim(r, t, f.value, f.tag_offset);
        } else if (f.wire == Wire::bytes) {
          r.enter(f);
          while (r.position() < r.limit()) {
            const std::uint64_t at = r.position();
            add_dim(r, t, r.varint(), at);
          }
          r.leave();
        } else {
          r.fail(f.tag_offset, "dims has the wire type of a fixed-width field");
        }
        break;
      case tensor_f::data_type:
        if (f.wire != Wire::varint) r.fail(f.tag_offset, "data_type is not a varint");
        t.data_type = f.value;
        break;
      case tensor_f::name:
        if (!name_known) t.name = r.string(f, max_string), t.has_name = true;
        break;
      case tensor_f::raw_data:
        if (f.wire != Wire::bytes) r.fail(f.tag_offset, "raw_data is not a bytes field");
        t.raw = f;  // a singular field: the last one counts
        break;
      case tensor_f::float_data: typed(DataField::float_data); break;
      case tensor_f::int32_data: typed(DataField::int32_data); break;
      case tensor_f::int64_data: typed(DataField::int64_data); break;
      case tensor_f::double_data: typed(DataField::double_data); break;
      case tensor_f::uint64_data: typed(DataField::uint64_data); break;
      case tensor_f::string_data: t.has_strings = true; break;
      case tensor_f::external_data: {
        if (f.wire != Wire::bytes) r.fail(f.tag_offset, "external_data is not a message");
        t.has_external_entries = true;
        r.enter(f);
        Field e;
        std::string key, value;
        while (r.next(e)) {
          if (e.number == entry_f::key) key = r.string(e, max_string);
          if (e.number == entry_f::value) value = r.string(e, max_string);
        }
        r.leave();
        t.external[key] = value;
        break;
      }
      case tensor_f::data_location:
        if (f.wire != Wire::varint) r.fail(f.tag_offset, "data_location is not a varint");
        t.data_location = f.value;
        break;
      default: break;
    }
  }

  // Checks a tensor and lists it.
  void add_tensor(std::size_t g, const PendingTensor& p, const std::string& graph_name, const std::string& how) {
    Graph& graph = graphs_[g];
    const std::string origin = how + graph.origin_suffix;
    const std::string who = fmt::format("tensor {} ({})", quoted_name(graph_name), origin);
    auto refuse = [&](const std::string& what, std::string_view hint = hint_damaged) {
      throw usage_error(fmt::format("{}: {}", who, what), path_, std::string(hint));
    };

    const OnnxType* type = find_type(p.data_type);
    if (!type) refuse(fmt::format("unknown data_type {}", p.data_type), "lobit knows the ONNX element types 1-23");
    if (!type->dtype)
      refuse(fmt::format("data_type {} ({}) is not a type lobit reads", type->number, type->name),
             "lobit reads float, integer and bool tensors; convert this one or leave it out of the model");
    const DType dtype = *type->dtype;

    TensorInfo info;
    info.name = graph_name;
    info.file = path_;
    info.dtype = dtype;
    info.shape = p.dims;
    info.origin = origin;
    std::uint64_t count = 1;
    for (std::uint64_t d : p.dims)
      if (__builtin_mul_overflow(count, d, &count))
        refuse(fmt::format("dims {} have more than 2^64 elements", shape_text(p.dims)));
    std::uint64_t bytes = 0;
    if (__builtin_mul_overflow(count, static_cast<std::uint64_t>(dtype_bytes(dtype)), &bytes))
      refuse(fmt::format("dims {} of {} need more than 2^64 bytes", shape_text(p.dims), type->name));
    const std::string need = fmt::format("dims {} of {} need {} bytes", shape_text(p.dims), type->name, bytes);

    // Which field holds the elements: exactly one may.
    Layout l;
    l.msg_begin = p.msg_begin;
    l.msg_end = p.msg_end;
    std::vector<DataField> present;
    if (p.raw) present.push_back(DataField::raw);
    for (const auto& [field, d] : p.typed)
      if (d.records > 0) present.push_back(field);
    if (p.has_strings) refuse("holds string_data, which lobit does not read");
    const bool external = p.data_location == location_external;
    if (p.has_external_entries && !external)
      refuse("has external_data entries but its data_location is not EXTERNAL");
    if (external && !present.empty())
      refuse(fmt::format("has its data_location EXTERNAL but also holds {}", field_name(present[0])));
    if (present.size() > 1)
      refuse(fmt::format("holds its data in both {} and {}", field_name(present[0]), field_name(present[1])));

    if (external) {
      l.field = DataField::external;
      locate_external(p, bytes, l, info, refuse);
    } else if (present.empty()) {
      if (count != 0) refuse(fmt::format("holds no data, but {}", need));
      l.direct = true;  // nothing to read
    } else if (present[0] == DataField::raw) {
      l.field = DataField::raw;
      if (p.raw->length != bytes) refuse(fmt::format("raw_data holds {} bytes but {}", p.raw->length, need));
      l.direct = true;
      l.offset = p.raw->offset;
    } else {
      const DataField field = present[0];
      l.field = field;
      if (!field_holds(field, dtype))
        refuse(fmt::format("a {} tensor holds its data in {}, which is for {}", type->name, field_name(field),
                           field_purpose(field)));
      const auto& d = p.typed.at(field);
      const int width = wire_width(field);
      std::uint64_t n = 0;
      if (width > 0) {
        n = d.unpacked + d.packed_bytes / static_cast<std::uint64_t>(width);
        // One packed record of little-endian values is the tensor itself.
        if (d.records == 1 && d.first_packed) l.direct = true, l.offset = d.first_packed->offset;
      } else {
        // Counting varints means reading them: check their range on the way.
        n = decode_typed(*file_, l, dtype, graph_name, [](const unsigned char*, std::size_t) {});
      }
      if (n != count)
        refuse(fmt::format("{} holds {} values but dims {} need {}", field_name(field), n, shape_text(p.dims), count));
    }

    // Unique names: the first keeps its own; later ones are qualified by their subgraph.
    std::string name = graph_name;
    if (taken_.count(name)) {
      std::string q;
      for (const auto& s : graph.steps) q += s + "/";
      q += graph_name;
      name = q;
      for (int k = 2; taken_.count(name); ++k) name = fmt::format("{}~{}", q, k);
    }
    taken_.insert(name);
    info.name = name;
    graph.binds.insert(graph_name);
    weights_.push_back({g, graph_name});
    tensors_.push_back(std::move(info));
    layouts_.push_back(std::move(l));
  }

  template <class Refuse>
  void locate_external(const PendingTensor& p, std::uint64_t bytes, Layout& l, TensorInfo& info, Refuse&& refuse) {
    const auto loc = p.external.find("location");
    if (loc == p.external.end() || loc->second.empty()) refuse("has its data_location EXTERNAL but no location");
    const std::string& location = loc->second;
    if (location.find('\0') != std::string::npos) refuse("has an external data location with a NUL character");
    const fs::path rel(location);
    if (rel.is_absolute())
      refuse(fmt::format("external data location {} is an absolute path", quoted_name(location)),
             "external data must be in the model's folder or below it");
    // Lexically inside the folder, then also after symbolic links are followed.
    int level = 0;
    for (const auto& part : rel) {
      if (part == "..") --level;
      else if (part != "." && !part.empty()) ++level;
      if (level < 0)
        refuse(fmt::format("external data location {} leads out of the model's folder", quoted_name(location)),
               "external data must be in the model's folder or below it");
    }
    const fs::path dir = dir_.empty() ? fs::path(".") : dir_;
    const fs::path full = dir / rel;
    std::error_code ec;
    const fs::path real_dir = fs::canonical(dir, ec);
    const fs::path real = ec ? fs::path() : fs::canonical(full, ec);
    if (ec)
      refuse(fmt::format("external data file {} cannot be opened: {}", quoted_name(full.string()), ec.message()),
             "keep the data file beside the model");
    const auto [a, b] = std::mismatch(real_dir.begin(), real_dir.end(), real.begin(), real.end());
    if (a != real_dir.end())
      refuse(fmt::format("external data location {} leads out of the model's folder (through a link)",
                         quoted_name(location)),
             "external data must be in the model's folder or below it");
    if (!fs::is_regular_file(real, ec)) refuse(fmt::format("external data {} is not a regular file", quoted_name(full.string())));
    const std::uint64_t size = fs::file_size(real, ec);
    if (ec) refuse(fmt::format("external data file {} cannot be read: {}", quoted_name(full.string()), ec.message()));
    auto number = [&](const char* key, std::uint64_t fallback) {
      const auto it = p.external.find(key);
      if (it == p.external.end()) return fallback;
      const std::string& s = it->second;
      std::uint64_t v = 0;
      if (s.empty() || s.size() > 20) refuse(fmt::format("external data {} {} is not a number", key, quoted_name(s)));
      for (char c : s) {
        if (c < '0' || c > '9' || __builtin_mul_overflow(v, 10u, &v) ||
            __builtin_add_overflow(v, static_cast<std::uint64_t>(c - '0'), &v))
          refuse(fmt::format("external data {} {} is not a number below 2^64", key, quoted_name(s)));
      }
      return v;
    };
    const std::uint64_t offset = number("offset", 0);
    const std::uint64_t length = number("length", bytes);
    if (length != bytes)
      refuse(fmt::format("external data length {} but dims {} need {} bytes", length, shape_text(p.dims), bytes));
    if (offset > size || length > size - offset)
      refuse(fmt::format("external data of {} bytes at offset {} passes the end of {} ({} bytes)", length, offset,
                         full.string(), size),
             "the data file is truncated or does not belong to this model");
    l.offset = offset;
    l.external_path = full.string();
    info.file = l.external_path;
  }

  // --- axis hints ---

  struct Opinion {
    std::vector<int> reduce;
    std::string reason;
  };

  // Calls f(graph, node, input) for every use of `name` in graph g and in the
  // subgraphs below it that do not bind the name themselves.
  template <class F>
  void for_each_use(std::size_t g, const std::string& name, F&& f) const {
    const Graph& graph = graphs_[g];
    if (auto it = graph.uses.find(name); it != graph.uses.end())
      for (const auto& [node, k] : it->second) f(g, node, k);
    for (std::size_t s : graph.children)
      if (!graphs_[s].binds.count(name)) for_each_use(s, name, f);
  }

  static std::vector<int> range(int from, int to) {
    std::vector<int> v;
    for (int a = from; a < to; ++a) v.push_back(a);
    return v;
  }

  // What the use of a tensor of rank `rank` as input k of node n says.
  void opinions(std::size_t g, std::size_t ni, std::size_t k, int rank, int hops, std::vector<Opinion>& out) const {
    const Node& n = graphs_[g].nodes[ni];
    if (!default_domain(n.domain)) return;
    const std::string who = node_label(n, ni) + graphs_[g].origin_suffix;
    const std::string& op = n.op_type;
    // The integer and quantized-linear forms take the weight at another input index.
    const bool matmul = op == "MatMul" || op == "MatMulInteger" || op == "QLinearMatMul";
    const bool conv = op == "Conv" || op == "ConvInteger" || op == "QLinearConv";
    const std::size_t a_in = 0, b_in = op == "QLinearMatMul" ? 3 : 1, w_in = op == "QLinearConv" ? 3 : 1;
    if (matmul) {
      if (rank < 2) return;
      if (k == b_in) out.push_back({{rank - 2}, fmt::format("{} input B {}", who, rank == 2 ? "[K, N]" : "[..., K, N]")});
      if (k == a_in) out.push_back({{rank - 1}, fmt::format("{} input A {}", who, rank == 2 ? "[M, K]" : "[..., M, K]")});
    } else if (op == "Gemm") {
      if (rank != 2) return;
      if (k == 1)
        out.push_back(n.trans_b ? Opinion{{1}, who + " input B [N, K] (transB=1)"} : Opinion{{0}, who + " input B [K, N]"});
      else if (k == 0)
        out.push_back(n.trans_a ? Opinion{{0}, who + " input A [K, M] (transA=1)"} : Opinion{{1}, who + " input A [M, K]"});
    } else if (conv) {
      if (k == w_in && rank >= 3) out.push_back({range(1, rank), who + " weight [out, in/groups, kernel...]"});
    } else if (op == "ConvTranspose") {
      if (k == 1 && rank >= 3) {
        std::vector<int> r = {0};
        for (int a = 2; a < rank; ++a) r.push_back(a);
        out.push_back({r, who + " weight [in, out/groups, kernel...]: each output channel sums over in and the kernel"});
      }
    } else if (op == "LSTM" || op == "GRU" || op == "RNN") {
      if (rank == 3 && k == 1) out.push_back({{2}, who + " input W [directions, gates*hidden, input]"});
      if (rank == 3 && k == 2) out.push_back({{2}, who + " input R [directions, gates*hidden, hidden]"});
    } else if ((op == "Cast" || op == "Identity" || op == "DequantizeLinear" || op == "Transpose") && k == 0 &&
               hops < 4 && !n.outputs.empty() && !n.outputs[0].empty()) {
      // Follow the value through the elementwise or layout node to its consumers.
      std::vector<int> perm;
      std::string via = " via " + node_label(n, ni);
      if (op == "Transpose") {
        if (n.has_perm) {
          if (!n.perm_ok || static_cast<int>(n.perm.size()) != rank) return;
          std::vector<bool> seen(static_cast<std::size_t>(rank), false);
          for (std::int64_t p : n.perm) {
            if (p < 0 || p >= rank || seen[static_cast<std::size_t>(p)]) return;
            seen[static_cast<std::size_t>(p)] = true;
            perm.push_back(static_cast<int>(p));
          }
        } else {
          for (int a = rank - 1; a >= 0; --a) perm.push_back(a);
        }
        std::string p;
        for (int a : perm) p += (p.empty() ? "" : ", ") + std::to_string(a);
        via += fmt::format(" perm [{}]", p);
      }
      std::vector<Opinion> next;
      for_each_use(g, n.outputs[0], [&](std::size_t g2, std::size_t n2, std::size_t k2) {
        opinions(g2, n2, k2, rank, hops + 1, next);
      });
      for (Opinion& o : next) {
        if (!perm.empty()) {
          // Output axis a of a Transpose is input axis perm[a].
          for (int& a : o.reduce) a = perm[static_cast<std::size_t>(a)];
          std::sort(o.reduce.begin(), o.reduce.end());
        }
        o.reason += via;
        out.push_back(std::move(o));
      }
    }
  }

  void add_hints() {
    for (std::size_t i = 0; i < tensors_.size(); ++i) {
      TensorInfo& t = tensors_[i];
      if (t.shape.size() < 2) continue;  // biases, norms, scalars: nothing to choose
      const auto& [g, name] = weights_[i];
      std::vector<Opinion> all;
      for_each_use(g, name, [&](std::size_t g2, std::size_t n2, std::size_t k2) {
        opinions(g2, n2, k2, static_cast<int>(t.shape.size()), 0, all);
      });
      if (all.empty()) continue;
      const bool agree = std::all_of(all.begin(), all.end(), [&](const Opinion& o) { return o.reduce == all[0].reduce; });
      if (!agree) continue;  // consumers disagree: leave the choice to the defaults and rules
      std::string reason = all[0].reason;
      if (all.size() > 1) reason += fmt::format(" (and {} more consumers alike)", all.size() - 1);
      t.axis_hint = AxisHint{all[0].reduce, std::move(reason)};
    }
  }

  std::string path_;
  std::shared_ptr<const RandomAccessFile> file_;
  fs::path dir_;
  std::vector<Graph> graphs_;
  std::vector<TensorInfo> tensors_;
  std::vector<Layout> layouts_;
  std::vector<std::pair<std::size_t, std::string>> weights_;  // per tensor: its graph and name there
  std::unordered_set<std::string> taken_;
};

}  // namespace

std::unique_ptr<Checkpoint> open_onnx(const std::string& path) { return ModelReader(path).read(); }

bool looks_like_onnx(const unsigned char* head, std::size_t n) {
  // ModelProto fields in the order every protobuf writer emits them: ir_version (1)
  // comes first; after it, any well-formed field. Stops at the first field that runs
  // past the bytes given.
  std::size_t p = 0;
  bool first = true;
  while (p < n) {
    std::uint64_t tag = 0;
    int used = pb::decode_varint(head + p, n - p, tag);
    if (used == 0) return !first;
    if (used < 0 || tag > 0xffffffffu || (tag >> 3) == 0) return false;
    p += static_cast<std::size_t>(used);
    const unsigned wire = tag & 7;
    if (first && tag != ((model_f::ir_version << 3) | 0)) return false;
    std::uint64_t v = 0;
    switch (wire) {
      case 0:
        used = pb::decode_varint(head + p, n - p, v);
        if (used < 0) return false;
        if (used == 0) return !first;
        if (first && (v < 1 || v > 100)) return false;  // IR versions so far: 1 to 11
        p += static_cast<std::size_t>(used);
        break;
      case 1: p += 8; break;
      case 5: p += 4; break;
      case 2:
        used = pb::decode_varint(head + p, n - p, v);
        if (used < 0) return false;
        if (used == 0) return true;
        p += static_cast<std::size_t>(used);
        if (v > n - p) return true;  // continues past the head
        p += static_cast<std::size_t>(v);
        break;
      default: return false;
    }
    first = false;
  }
  return !first;
}

}  // namespace lobit::io
