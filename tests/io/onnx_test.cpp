// The ONNX reader on synthetic models written by a small protobuf encoder of the test's
// own (independent of src/io/protobuf_wire): every place a weight can live, every way its
// elements can be stored, the axis hints of the graph, and malformed files.
#include <doctest/doctest.h>
#include <fmt/format.h>
#include <unistd.h>

#include <atomic>
#include <bit>
#include <cmath>
#include <cstdint>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <functional>
#include <initializer_list>
#include <limits>
#include <optional>
#include <string>
#include <thread>
#include <vector>

#include "lobit/error.hpp"
#include "lobit/io/checkpoint.hpp"
#include "lobit/io/onnx.hpp"

using namespace lobit;
using namespace lobit::io;
namespace fs = std::filesystem;

namespace {

// --- protobuf encoding (from memory of the protobuf encoding documentation:
// key = field << 3 | wire type; varints little-endian base 128) ---

std::string varint(std::uint64_t v) {
  std::string s;
  do {
    unsigned char b = v & 0x7f;
    v >>= 7;
    if (v) b |= 0x80;
    s.push_back(static_cast<char>(b));
  } while (v);
  return s;
}
std::string key(std::uint32_t field, int wire) { return varint((static_cast<std::uint64_t>(field) << 3) | wire); }

template <class T>
std::string little_endian(const std::vector<T>& v) {
  std::string s;
  for (const T& x : v) {
    std::uint64_t bits = 0;
    if constexpr (sizeof(T) == 8) bits = std::bit_cast<std::uint64_t>(x);
    else if constexpr (sizeof(T) == 4) bits = std::bit_cast<std::uint32_t>(x);
    else if constexpr (sizeof(T) == 2) bits = std::bit_cast<std::uint16_t>(x);
    else bits = std::bit_cast<std::uint8_t>(x);
    for (std::size_t b = 0; b < sizeof(T); ++b) s.push_back(static_cast<char>(bits >> (8 * b)));
  }
  return s;
}

struct Pb {
  std::string b;
  Pb& u(std::uint32_t f, std::uint64_t v) { return raw(key(f, 0) + varint(v)); }
  Pb& i(std::uint32_t f, std::int64_t v) { return u(f, static_cast<std::uint64_t>(v)); }
  Pb& f32(std::uint32_t f, float v) { return raw(key(f, 5) + little_endian(std::vector<float>{v})); }
  Pb& f64(std::uint32_t f, double v) { return raw(key(f, 1) + little_endian(std::vector<double>{v})); }
  Pb& s(std::uint32_t f, const std::string& v) { return raw(key(f, 2) + varint(v.size()) + v); }
  Pb& m(std::uint32_t f, const Pb& v) { return s(f, v.b); }
  Pb& packed(std::uint32_t f, const std::vector<std::uint64_t>& vs) {
    std::string p;
    for (auto v : vs) p += varint(v);
    return s(f, p);
  }
  Pb& raw(const std::string& bytes) {
    b += bytes;
    return *this;
  }
};

// --- ONNX messages (onnx.proto field numbers, from memory) ---

enum OnnxType : int {
  FLOAT = 1, UINT8 = 2, INT8 = 3, UINT16 = 4, INT16 = 5, INT32 = 6, INT64 = 7, STRING = 8, BOOL = 9,
  FLOAT16 = 10, DOUBLE = 11, UINT32 = 12, UINT64 = 13, COMPLEX64 = 14, BFLOAT16 = 16,
  F8_E4M3 = 17, F8_E4M3_NZ = 18, F8_E5M2 = 19, F8_E5M2_NZ = 20, INT4 = 22,
};
namespace T {  // TensorProto
constexpr std::uint32_t dims = 1, data_type = 2, float_data = 4, int32_data = 5, string_data = 6, int64_data = 7,
                        name = 8, raw_data = 9, double_data = 10, uint64_data = 11, external_data = 13,
                        data_location = 14;
}

Pb tensor(const std::string& name, int type, const std::vector<std::uint64_t>& dims, bool packed_dims = false) {
  Pb t;
  if (packed_dims) t.packed(T::dims, dims);
  else
    for (auto d : dims) t.u(T::dims, d);
  t.u(T::data_type, static_cast<std::uint64_t>(type));
  if (!name.empty()) t.s(T::name, name);
  return t;
}
Pb f32_raw(const std::string& name, const std::vector<std::uint64_t>& dims, const std::vector<float>& v) {
  return tensor(name, FLOAT, dims).s(T::raw_data, little_endian(v));
}
// A float tensor of the given shape holding -1, -0.5, 0, 0.5, ...
Pb weight(const std::string& name, std::vector<std::uint64_t> dims) {
  std::uint64_t n = 1;
  for (auto d : dims) n *= d;
  std::vector<float> v(n);
  for (std::uint64_t k = 0; k < n; ++k) v[k] = static_cast<float>(k) * 0.5f - 1.0f;
  return f32_raw(name, dims, v);
}

Pb node(const std::string& op, const std::string& name, const std::vector<std::string>& in,
        const std::vector<std::string>& out) {
  Pb n;
  for (const auto& x : in) n.s(1, x);
  for (const auto& x : out) n.s(2, x);
  if (!name.empty()) n.s(3, name);
  n.s(4, op);
  return n;
}
// AttributeProto: name 1, i 3, t 5, g 6, ints 8, graphs 11, type 20 (INT 2, TENSOR 4, GRAPH 5, INTS 7, GRAPHS 10).
Pb attr_int(const std::string& name, std::int64_t v) { return Pb().s(1, name).i(3, v).u(20, 2); }
Pb attr_ints(const std::string& name, const std::vector<std::uint64_t>& v) { return Pb().s(1, name).packed(8, v).u(20, 7); }
Pb attr_tensor(const std::string& name, const Pb& t) { return Pb().s(1, name).m(5, t).u(20, 4); }
Pb attr_graph(const std::string& name, const Pb& g) { return Pb().s(1, name).m(6, g).u(20, 5); }
Pb constant(const std::string& output, const Pb& t) {
  return node("Constant", "", {}, {output}).m(5, attr_tensor("value", t));
}
// GraphProto: node 1, name 2, initializer 5, input 11 (ValueInfoProto name 1), sparse_initializer 15.
Pb graph() { return Pb().s(2, "g"); }
Pb& with_input(Pb& g, const std::string& name) { return g.m(11, Pb().s(1, name)); }
// ModelProto: ir_version 1, producer_name 2, opset_import 8, graph 7.
std::string model(const Pb& g) {
  return Pb().u(1, 8).s(2, "lobit-test").m(7, g).m(8, Pb().s(1, "").u(2, 17)).b;
}

// --- files ---

struct TempDir {
  fs::path dir;
  TempDir() {
    static std::atomic<int> n{0};
    dir = fs::temp_directory_path() / fmt::format("lobit-onnx-test-{}-{}", ::getpid(), n++);
    fs::create_directories(dir);
  }
  ~TempDir() {
    std::error_code ec;
    fs::remove_all(dir, ec);
  }
  std::string write(const std::string& name, const std::string& bytes) const {
    const fs::path p = dir / name;
    fs::create_directories(p.parent_path());
    std::ofstream(p, std::ios::binary).write(bytes.data(), static_cast<std::streamsize>(bytes.size()));
    return p.string();
  }
};

std::vector<double> values(const Checkpoint& c, std::size_t i) {
  std::vector<double> v(static_cast<std::size_t>(c.tensors()[i].count()));
  c.read_f64(i, 0, v.size(), v.data());
  return v;
}
std::vector<unsigned char> raw_bytes(const Checkpoint& c, std::size_t i) {
  const auto& t = c.tensors()[i];
  std::vector<unsigned char> v(static_cast<std::size_t>(t.bytes()));
  c.read_raw(i, 0, t.count(), v.data());
  return v;
}
std::size_t index_of(const Checkpoint& c, const std::string& name) {
  const auto i = c.find(name);
  REQUIRE_MESSAGE(i.has_value(), "no tensor ", name);
  return *i;
}
const TensorInfo& info(const Checkpoint& c, const std::string& name) { return c.tensors()[index_of(c, name)]; }

// Opens and reads every tensor; returns the error message (fails when there is none).
std::string refusal(const std::string& path) {
  try {
    auto c = open_onnx(path);
    for (std::size_t i = 0; i < c->tensors().size(); ++i) values(*c, i);
  } catch (const Error& e) {
    CHECK(e.kind() == Error::Kind::usage);
    return e.message();
  }
  FAIL("no error for ", path);
  return {};
}
void check_refused(const std::string& path, std::initializer_list<std::string_view> parts) {
  const std::string m = refusal(path);
  CHECK_MESSAGE(m.find(path) != std::string::npos, m);
  for (auto p : parts) CHECK_MESSAGE(m.find(p) != std::string::npos, "expected '", p, "' in: ", m);
}

}  // namespace

TEST_CASE("raw_data initializers, packed and unpacked dims, scalars") {
  TempDir d;
  Pb g = graph();
  g.m(5, f32_raw("w", {2, 3}, {1.5f, -2.0f, 0.0f, 3.25f, -0.125f, 1e-30f}));
  g.m(5, tensor("p", FLOAT, {3, 1, 2}, true).s(T::raw_data, little_endian(std::vector<float>{1, 2, 3, 4, 5, 6})));
  g.m(5, tensor("scalar", FLOAT, {}).s(T::raw_data, little_endian(std::vector<float>{7.0f})));
  g.m(5, tensor("d", DOUBLE, {2}).s(T::raw_data, little_endian(std::vector<double>{0.1, -1e300})));
  const std::string path = d.write("m.onnx", model(g));
  auto c = open_onnx(path);
  CHECK(c->kind() == "onnx");
  CHECK(c->path() == path);
  REQUIRE(c->tensors().size() == 4);
  const auto& w = info(*c, "w");
  CHECK(w.dtype == DType::f32);
  CHECK(w.shape == std::vector<std::uint64_t>{2, 3});
  CHECK(w.origin == "initializer");
  CHECK(w.file == path);
  CHECK(values(*c, index_of(*c, "w")) == std::vector<double>{1.5, -2.0, 0.0, 3.25, -0.125, double(1e-30f)});
  CHECK(info(*c, "p").shape == std::vector<std::uint64_t>{3, 1, 2});
  CHECK(values(*c, index_of(*c, "p")) == std::vector<double>{1, 2, 3, 4, 5, 6});
  CHECK(info(*c, "scalar").shape.empty());
  CHECK(values(*c, index_of(*c, "scalar")) == std::vector<double>{7.0});
  CHECK(info(*c, "d").dtype == DType::f64);
  CHECK(values(*c, index_of(*c, "d")) == std::vector<double>{0.1, -1e300});
  // A sub-range, as the scoring reads rows.
  double two[2];
  c->read_f64(index_of(*c, "w"), 3, 2, two);
  CHECK(two[0] == 3.25);
  CHECK(two[1] == -0.125);
}

TEST_CASE("float_data and double_data: packed (read in place), unpacked and split records (decoded)") {
  TempDir d;
  std::vector<float> v(40000);  // unpacked: 200 KB on the wire, several decode chunks
  for (std::size_t k = 0; k < v.size(); ++k) v[k] = static_cast<float>(k) / 7.0f - 100.0f;
  std::vector<std::uint64_t> dims = {200, 200};
  Pb packed = tensor("packed", FLOAT, dims).s(T::float_data, little_endian(v));
  Pb unpacked = tensor("unpacked", FLOAT, dims);
  for (float x : v) unpacked.f32(T::float_data, x);
  // A packed repeated field may come in several records; they concatenate.
  Pb split = tensor("split", FLOAT, dims);
  split.s(T::float_data, little_endian(std::vector<float>(v.begin(), v.begin() + 12345)));
  split.f32(T::float_data, v[12345]);
  split.s(T::float_data, little_endian(std::vector<float>(v.begin() + 12346, v.end())));
  Pb dbl = tensor("dbl", DOUBLE, {3}).s(T::double_data, little_endian(std::vector<double>{1.0 / 3, -2.5, 1e-310}));
  Pb dbl_unpacked = tensor("dbl_unpacked", DOUBLE, {2}).f64(T::double_data, 0.2).f64(T::double_data, -7.0);
  Pb g = graph();
  g.m(5, packed).m(5, unpacked).m(5, split).m(5, dbl).m(5, dbl_unpacked);
  auto c = open_onnx(d.write("m.onnx", model(g)));
  const std::vector<double> want(v.begin(), v.end());
  CHECK(values(*c, index_of(*c, "packed")) == want);
  CHECK(values(*c, index_of(*c, "unpacked")) == want);
  CHECK(values(*c, index_of(*c, "split")) == want);
  CHECK(values(*c, index_of(*c, "dbl")) == std::vector<double>{1.0 / 3, -2.5, 1e-310});
  CHECK(values(*c, index_of(*c, "dbl_unpacked")) == std::vector<double>{0.2, -7.0});
  // Read twice and from the middle: the decoded copy is kept and addressed per element.
  double mid[3];
  c->read_f64(index_of(*c, "unpacked"), 30000, 3, mid);
  CHECK(mid[0] == want[30000]);
  CHECK(mid[2] == want[30002]);
}

TEST_CASE("int32_data holding 16- and 8-bit float bit patterns and small integers") {
  TempDir d;
  auto int32_tensor = [](const std::string& name, int type, const std::vector<std::int64_t>& vals) {
    Pb t = tensor(name, type, {vals.size()});
    std::vector<std::uint64_t> u;
    for (auto x : vals) u.push_back(static_cast<std::uint64_t>(x));
    return t.packed(T::int32_data, u);
  };
  Pb g = graph();
  // IEEE 754-2008 binary16 (bias 15): 1.0, -2.0, largest finite 65504, smallest subnormal 2^-24.
  g.m(5, int32_tensor("h", FLOAT16, {0x3C00, 0xC000, 0x7BFF, 0x0001}));
  // bfloat16 (the top half of a binary32): 1.0, -3.0, 2^-126 (smallest normal).
  g.m(5, int32_tensor("bf", BFLOAT16, {0x3F80, 0xC040, 0x0080}));
  // OCP OFP8 v1.0 E4M3 (bias 7): 1.0, largest 448, smallest subnormal 2^-9, NaN S.1111.111.
  g.m(5, int32_tensor("e4m3", F8_E4M3, {0x38, 0x7E, 0x01, 0x7F}));
  // OCP OFP8 v1.0 E5M2 (bias 15): 1.0, largest 57344, -infinity.
  g.m(5, int32_tensor("e5m2", F8_E5M2, {0x3C, 0x7B, 0xFC}));
  // The bias-8 / bias-16 variants without negative zero (0x80 is their only NaN), from memory.
  g.m(5, int32_tensor("e4m3nz", F8_E4M3_NZ, {0x40, 0x7F, 0x80}));
  g.m(5, int32_tensor("e5m2nz", F8_E5M2_NZ, {0x40, 0x7F}));
  // Negative int32_data values are written sign-extended to 64 bits (ten-byte varints).
  g.m(5, int32_tensor("i8", INT8, {-5, 127, -128}));
  g.m(5, int32_tensor("i16", INT16, {-30000, 2}));
  g.m(5, int32_tensor("u8", UINT8, {255, 0}));
  g.m(5, int32_tensor("b", BOOL, {1, 0, 1}));
  g.m(5, int32_tensor("i32", INT32, {-2147483648LL, 2147483647}));
  // Unpacked int32_data entries.
  g.m(5, tensor("h_unpacked", FLOAT16, {2}).u(T::int32_data, 0x3C00).u(T::int32_data, 0xBC00));
  auto c = open_onnx(d.write("m.onnx", model(g)));
  CHECK(info(*c, "h").dtype == DType::f16);
  CHECK(values(*c, index_of(*c, "h")) == std::vector<double>{1.0, -2.0, 65504.0, std::ldexp(1.0, -24)});
  CHECK(values(*c, index_of(*c, "bf")) == std::vector<double>{1.0, -3.0, std::ldexp(1.0, -126)});
  const auto e4 = values(*c, index_of(*c, "e4m3"));
  CHECK(info(*c, "e4m3").dtype == DType::f8_e4m3);
  CHECK(e4[0] == 1.0);
  CHECK(e4[1] == 448.0);
  CHECK(e4[2] == std::ldexp(1.0, -9));
  CHECK(std::isnan(e4[3]));
  CHECK(values(*c, index_of(*c, "e5m2")) ==
        std::vector<double>{1.0, 57344.0, -std::numeric_limits<double>::infinity()});
  const auto nz = values(*c, index_of(*c, "e4m3nz"));
  CHECK(info(*c, "e4m3nz").dtype == DType::f8_e4m3_nz);
  CHECK(nz[0] == 1.0);
  CHECK(nz[1] == 240.0);  // 1.875 * 2^(15 - 8)
  CHECK(std::isnan(nz[2]));
  CHECK(info(*c, "e5m2nz").dtype == DType::f8_e5m2_nz);
  CHECK(values(*c, index_of(*c, "e5m2nz")) == std::vector<double>{1.0, 1.75 * 32768.0});  // 1.75 * 2^(31 - 16)
  CHECK(raw_bytes(*c, index_of(*c, "i8")) == std::vector<unsigned char>{0xFB, 0x7F, 0x80});
  CHECK(values(*c, index_of(*c, "i8")) == std::vector<double>{-5, 127, -128});
  CHECK(values(*c, index_of(*c, "i16")) == std::vector<double>{-30000, 2});
  CHECK(raw_bytes(*c, index_of(*c, "i16")) == std::vector<unsigned char>{0xD0, 0x8A, 0x02, 0x00});
  CHECK(values(*c, index_of(*c, "u8")) == std::vector<double>{255, 0});
  CHECK(info(*c, "b").dtype == DType::boolean);
  CHECK(values(*c, index_of(*c, "b")) == std::vector<double>{1, 0, 1});
  CHECK(values(*c, index_of(*c, "i32")) == std::vector<double>{-2147483648.0, 2147483647.0});
  CHECK(values(*c, index_of(*c, "h_unpacked")) == std::vector<double>{1.0, -1.0});
}

TEST_CASE("int64_data and uint64_data") {
  TempDir d;
  Pb g = graph();
  g.m(5, tensor("i64", INT64, {3}).packed(T::int64_data, {static_cast<std::uint64_t>(-1LL), 1ull << 40, 7}));
  g.m(5, tensor("u64", UINT64, {2}).u(T::uint64_data, ~0ull).u(T::uint64_data, 3));
  g.m(5, tensor("u32", UINT32, {2}).packed(T::uint64_data, {4294967295ull, 0}));
  auto c = open_onnx(d.write("m.onnx", model(g)));
  const auto i64 = raw_bytes(*c, index_of(*c, "i64"));
  REQUIRE(i64.size() == 24);
  CHECK(std::vector<unsigned char>(i64.begin(), i64.begin() + 8) == std::vector<unsigned char>(8, 0xFF));
  CHECK(values(*c, index_of(*c, "i64")) == std::vector<double>{-1.0, std::ldexp(1.0, 40), 7.0});
  CHECK(raw_bytes(*c, index_of(*c, "u64")) ==
        std::vector<unsigned char>{0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 3, 0, 0, 0, 0, 0, 0, 0});
  CHECK(info(*c, "u32").dtype == DType::u32);
  CHECK(values(*c, index_of(*c, "u32")) == std::vector<double>{4294967295.0, 0});
}

TEST_CASE("decoded tensors read from several threads at once") {
  TempDir d;
  Pb g = graph();
  std::vector<std::uint64_t> bits;
  for (std::uint64_t k = 0; k < 100000; ++k) bits.push_back(k % 0x7C00);  // finite binary16 codes
  for (int t = 0; t < 4; ++t) g.m(5, tensor(fmt::format("h{}", t), FLOAT16, {bits.size()}).packed(T::int32_data, bits));
  auto c = open_onnx(d.write("m.onnx", model(g)));
  std::vector<std::vector<double>> got(8);
  std::vector<std::thread> threads;
  for (int k = 0; k < 8; ++k) threads.emplace_back([&, k] { got[k] = values(*c, static_cast<std::size_t>(k % 4)); });
  for (auto& th : threads) th.join();
  for (int k = 0; k < 8; ++k) {
    REQUIRE(got[k].size() == bits.size());
    CHECK(got[k][0] == 0.0);
    CHECK(got[k][0x3C00] == 1.0);  // binary16 0x3C00 = 1.0 (IEEE 754-2008)
    CHECK(got[k] == got[0]);
  }
}

TEST_CASE("Constant nodes in the main graph and in If / Loop subgraphs; unique names") {
  TempDir d;
  Pb then_g = graph(), else_g = graph(), body = graph(), inner = graph();
  then_g.m(1, constant("w", weight("", {2, 2})));
  else_g.m(1, constant("w", weight("", {3})));
  else_g.m(5, weight("else_init", {2}));
  inner.m(1, constant("deep", weight("", {1})));
  body.m(1, constant("loop_w", weight("", {4})));
  body.m(1, node("If", "", {"c"}, {"y"}).m(5, attr_graph("then_branch", inner)));
  Pb g = graph();
  g.m(1, constant("top", weight("ignored_inner_name", {2, 3})));
  g.m(1, node("If", "if0", {"cond"}, {"o"}).m(5, attr_graph("then_branch", then_g)).m(5, attr_graph("else_branch", else_g)));
  g.m(1, node("Loop", "loop", {"", "cond"}, {"o2"}).m(5, attr_graph("body", body)));
  // Same name twice in the main graph: the second one is numbered.
  g.m(5, weight("twice", {1}));
  g.m(1, constant("twice", weight("", {2})));
  // A Constant of another domain is not the standard operator.
  g.m(1, node("Constant", "", {}, {"custom"}).s(7, "com.example").m(5, attr_tensor("value", weight("", {1}))));
  auto c = open_onnx(d.write("m.onnx", model(g)));
  std::vector<std::string> names;
  for (const auto& t : c->tensors()) names.push_back(t.name);
  CHECK(names == std::vector<std::string>{"top", "w", "if0/else_branch/w", "else_init", "loop_w", "deep", "twice",
                                          "twice~2"});
  CHECK(info(*c, "top").origin == "Constant node");
  CHECK(info(*c, "top").shape == std::vector<std::uint64_t>{2, 3});
  CHECK(values(*c, index_of(*c, "top")) == std::vector<double>{-1.0, -0.5, 0.0, 0.5, 1.0, 1.5});
  CHECK(info(*c, "w").origin == "Constant node in subgraph If 'if0'/then_branch");
  CHECK(info(*c, "w").shape == std::vector<std::uint64_t>{2, 2});
  CHECK(info(*c, "if0/else_branch/w").origin == "Constant node in subgraph If 'if0'/else_branch");
  CHECK(info(*c, "if0/else_branch/w").shape == std::vector<std::uint64_t>{3});
  CHECK(info(*c, "else_init").origin == "initializer in subgraph If 'if0'/else_branch");
  CHECK(info(*c, "loop_w").origin == "Constant node in subgraph Loop 'loop'/body");
  CHECK(info(*c, "deep").origin == "Constant node in subgraph Loop 'loop'/body > If #1/then_branch");
  CHECK(info(*c, "twice").origin == "initializer");
  CHECK(info(*c, "twice~2").origin == "Constant node");
  CHECK(info(*c, "twice~2").shape == std::vector<std::uint64_t>{2});
  CHECK_FALSE(c->find("custom").has_value());
}

TEST_CASE("qualified names for a repeated name in unnamed nested subgraphs") {
  TempDir d;
  Pb inner = graph();
  inner.m(5, weight("k", {1}));
  Pb mid = graph();
  mid.m(5, weight("k", {2}));
  mid.m(1, node("Relu", "", {"x"}, {"y"}));
  mid.m(1, node("Scan", "", {"x"}, {"z"}).m(5, Pb().s(1, "bodies").m(11, graph()).m(11, inner).u(20, 10)));
  Pb g = graph();
  g.m(5, weight("k", {3}));
  g.m(1, node("If", "", {"c"}, {"o"}).m(5, attr_graph("else_branch", mid)));
  auto c = open_onnx(d.write("m.onnx", model(g)));
  std::vector<std::string> names;
  for (const auto& t : c->tensors()) names.push_back(t.name);
  CHECK(names == std::vector<std::string>{"k", "If#0/else_branch/k", "If#0/else_branch/Scan#1/bodies[1]/k"});
  CHECK(info(*c, "If#0/else_branch/Scan#1/bodies[1]/k").origin ==
        "initializer in subgraph If #0/else_branch > Scan #1/bodies[1]");
}

TEST_CASE("empty tensors (a 0 in dims) are listed with no elements") {
  TempDir d;
  Pb g = graph();
  g.m(5, tensor("roi", FLOAT, {0}));                                    // no data field at all
  g.m(5, tensor("e2", FLOAT, {4, 0}).s(T::raw_data, ""));               // an empty raw_data
  auto c = open_onnx(d.write("m.onnx", model(g)));
  CHECK(info(*c, "roi").count() == 0);
  CHECK(info(*c, "e2").shape == std::vector<std::uint64_t>{4, 0});
  CHECK(values(*c, index_of(*c, "e2")).empty());
  // But an empty shape with bytes is inconsistent.
  Pb bad = graph();
  bad.m(5, tensor("e3", FLOAT, {0, 3}).s(T::raw_data, "abcd"));
  check_refused(d.write("bad.onnx", model(bad)), {"\"e3\"", "raw_data holds 4 bytes", "[0, 3]"});
}

TEST_CASE("external data beside the model") {
  TempDir d;
  const std::vector<float> v = {1.0f, 2.0f, -3.0f, 4.5f, 5.0f, 6.0f};
  std::string blob = std::string(16, 'x') + little_endian(v) + "tail";
  d.write("data/weights.bin", blob);
  auto ext = [](const std::string& name, const std::vector<std::uint64_t>& dims,
                const std::vector<std::pair<std::string, std::string>>& kv) {
    Pb t = tensor(name, FLOAT, dims);
    for (const auto& [k, val] : kv) t.m(T::external_data, Pb().s(1, k).s(2, val));
    return t.u(T::data_location, 1);
  };
  Pb g = graph();
  g.m(5, ext("e", {2, 3}, {{"location", "data/weights.bin"}, {"offset", "16"}, {"length", "24"}}));
  g.m(5, ext("e_nolength", {2}, {{"location", "./data/../data/weights.bin"}, {"offset", "24"}}));
  const std::string path = d.write("m.onnx", model(g));
  auto c = open_onnx(path);
  CHECK(values(*c, index_of(*c, "e")) == std::vector<double>{1, 2, -3, 4.5, 5, 6});
  CHECK(values(*c, index_of(*c, "e_nolength")) == std::vector<double>{-3, 4.5});
  CHECK(fs::equivalent(info(*c, "e").file, d.dir / "data/weights.bin"));

  auto refused = [&](const std::string& file, const Pb& t, std::initializer_list<std::string_view> parts) {
    Pb bad = graph();
    bad.m(5, t);
    check_refused(d.write(file, model(bad)), parts);
  };
  refused("escape.onnx", ext("up", {1}, {{"location", "../outside.bin"}}), {"\"up\"", "leads out of the model's folder"});
  refused("escape2.onnx", ext("up2", {1}, {{"location", "data/../../x.bin"}}), {"\"up2\"", "leads out"});
  refused("abs.onnx", ext("abs", {1}, {{"location", "/etc/hostname"}}), {"\"abs\"", "absolute path"});
  refused("past.onnx", ext("past", {6}, {{"location", "data/weights.bin"}, {"offset", "30"}}),
          {"\"past\"", "passes the end", "weights.bin"});
  refused("huge.onnx", ext("huge", {1}, {{"location", "data/weights.bin"}, {"offset", "18446744073709551615"}}),
          {"\"huge\"", "passes the end"});
  refused("len.onnx", ext("len", {2, 3}, {{"location", "data/weights.bin"}, {"length", "20"}}),
          {"\"len\"", "length 20", "24 bytes"});
  refused("missing.onnx", ext("missing", {1}, {{"location", "nowhere.bin"}}), {"\"missing\"", "cannot be opened"});
  refused("noloc.onnx", ext("noloc", {1}, {{"offset", "0"}}), {"\"noloc\"", "no location"});
  refused("num.onnx", ext("num", {1}, {{"location", "data/weights.bin"}, {"offset", "-4"}}), {"\"num\"", "not a number"});
  refused("both.onnx", ext("both", {1}, {{"location", "data/weights.bin"}}).s(T::raw_data, "abcd"),
          {"\"both\"", "EXTERNAL but also holds raw_data"});
  // A link inside the folder that points out of it.
  const fs::path outside = d.dir.parent_path() / fmt::format("lobit-onnx-outside-{}.bin", ::getpid());
  std::ofstream(outside, std::ios::binary) << std::string(64, '\0');
  fs::create_symlink(outside, d.dir / "link.bin");
  refused("link.onnx", ext("link", {4}, {{"location", "link.bin"}}), {"\"link\"", "through a link"});
  fs::remove(outside);
}

namespace {
std::optional<AxisHint> hint_of(const Checkpoint& c, const std::string& name) { return info(c, name).axis_hint; }
std::vector<int> axes(std::initializer_list<int> a) { return a; }
}  // namespace

TEST_CASE("axis hints from the consumers") {
  TempDir d;
  Pb g = graph();
  with_input(g, "x");
  // MatMul: B [K, N] reduces over K (axis 0), batched B [..., K, N] over axis rank-2, a constant A over its last.
  g.m(5, weight("mm_b", {4, 8})).m(1, node("MatMul", "mm", {"x", "mm_b"}, {"y1"}));
  g.m(5, weight("mm_b3", {2, 4, 8})).m(1, node("MatMul", "mm3", {"x", "mm_b3"}, {"y2"}));
  g.m(5, weight("mm_a", {4, 8})).m(1, node("MatMul", "mm_a_node", {"mm_a", "x"}, {"y3"}));
  // Gemm: B [K, N], or [N, K] with transB=1; A [M, K], or [K, M] with transA=1.
  g.m(5, weight("gemm_b", {4, 8})).m(1, node("Gemm", "gemm0", {"x", "gemm_b"}, {"y4"}));
  g.m(5, weight("gemm_bt", {8, 4}))
      .m(1, node("Gemm", "gemm1", {"x", "gemm_bt"}, {"y5"}).m(5, attr_int("transB", 1)));
  g.m(5, weight("gemm_at", {4, 8}))
      .m(1, node("Gemm", "gemm2", {"gemm_at", "x"}, {"y6"}).m(5, attr_int("transA", 1)).m(5, attr_int("transB", 0)));
  // Conv weight [out, in/groups, kh, kw]; ConvTranspose weight [in, out/groups, kh, kw].
  g.m(5, weight("conv_w", {8, 3, 3, 3})).m(1, node("Conv", "conv", {"x", "conv_w"}, {"y7"}));
  g.m(5, weight("deconv_w", {8, 3, 2, 2})).m(1, node("ConvTranspose", "deconv", {"x", "deconv_w"}, {"y8"}));
  // LSTM / GRU: W [dirs, gates*hidden, input], R [dirs, gates*hidden, hidden] over the last axis.
  g.m(5, weight("lstm_w", {1, 16, 3})).m(5, weight("lstm_r", {1, 16, 4}));
  g.m(1, node("LSTM", "lstm", {"x", "lstm_w", "lstm_r"}, {"y9"}));
  g.m(5, weight("gru_w", {2, 12, 3})).m(1, node("GRU", "", {"x", "gru_w", "gru_r_runtime"}, {"y10"}));
  // Through Transpose (axes mapped back through perm), Cast and DequantizeLinear.
  g.m(5, weight("t_w", {8, 4}))
      .m(1, node("Transpose", "tr", {"t_w"}, {"t_out"}).m(5, attr_ints("perm", {1, 0})))
      .m(1, node("MatMul", "mm_t", {"x", "t_out"}, {"y11"}));
  g.m(5, weight("t3_w", {4, 2, 8}))  // T = transpose(W, perm (1, 0, 2)): [2, 4, 8]; MatMul B reduces T axis 1 = W axis 0
      .m(1, node("Transpose", "tr3", {"t3_w"}, {"t3_out"}).m(5, attr_ints("perm", {1, 0, 2})))
      .m(1, node("MatMul", "mm_t3", {"x", "t3_out"}, {"y12"}));
  g.m(5, weight("t_default", {8, 4}))  // no perm: the axes reversed
      .m(1, node("Transpose", "trd", {"t_default"}, {"td_out"}))
      .m(1, node("Gemm", "gemm_td", {"x", "td_out"}, {"y13"}));
  g.m(5, weight("cast_w", {4, 8}))
      .m(1, node("Cast", "cast", {"cast_w"}, {"cast_out"}))
      .m(1, node("MatMul", "mm_c", {"x", "cast_out"}, {"y14"}));
  g.m(5, weight("dq_w", {16, 3, 1, 1}))
      .m(1, node("DequantizeLinear", "dq", {"dq_w", "scale"}, {"dq_out"}))
      .m(1, node("Conv", "conv_dq", {"x", "dq_out"}, {"y15"}));
  // Integer and quantized-linear forms: B is input 1 of MatMulInteger and input 3 of
  // QLinearMatMul, the weight input 1 of ConvInteger and input 3 of QLinearConv (ONNX
  // operator documentation, from memory).
  g.m(5, weight("mmi_b", {4, 8})).m(1, node("MatMulInteger", "mmi", {"x", "mmi_b"}, {"y23"}));
  g.m(5, weight("qmm_b", {4, 8}))
      .m(1, node("QLinearMatMul", "qmm", {"x", "xs", "xz", "qmm_b", "bs", "bz", "ys", "yz"}, {"y24"}));
  g.m(5, weight("qconv_w", {8, 3, 3, 3}))
      .m(1, node("QLinearConv", "qconv", {"x", "xs", "xz", "qconv_w", "ws", "wz", "ys", "yz"}, {"y25"}));
  g.m(5, weight("qconv_scale", {8, 1}))  // a per-channel scale given as input 4: no opinion
      .m(1, node("QLinearConv", "qconv2", {"x", "xs", "xz", "qconv_w", "qconv_scale", "wz", "ys", "yz"}, {"y26"}));
  // Two consumers that agree; two that disagree; one of another domain; a bias.
  g.m(5, weight("shared", {4, 8})).m(1, node("MatMul", "s1", {"x", "shared"}, {"y16"}));
  g.m(1, node("MatMul", "s2", {"y1", "shared"}, {"y17"})).m(1, node("Shape", "sh", {"shared"}, {"y18"}));
  g.m(5, weight("conflict", {4, 4})).m(1, node("MatMul", "c1", {"x", "conflict"}, {"y19"}));
  g.m(1, node("MatMul", "c2", {"conflict", "x"}, {"y20"}));
  g.m(5, weight("custom", {4, 4})).m(1, node("MatMul", "cu", {"x", "custom"}, {"y21"}).s(7, "com.example"));
  g.m(5, weight("bias", {8})).m(1, node("Gemm", "gb", {"x", "gemm_b", "bias"}, {"y22"}));
  g.m(5, weight("unused", {4, 4}));
  auto c = open_onnx(d.write("m.onnx", model(g)));

  auto expect = [&](const std::string& name, std::vector<int> reduce, std::string_view reason) {
    CAPTURE(name);
    const auto h = hint_of(*c, name);
    REQUIRE(h.has_value());
    CHECK(h->reduce == reduce);
    CHECK_MESSAGE(h->reason.find(reason) != std::string::npos, h->reason);
  };
  expect("mm_b", axes({0}), "MatMul 'mm' input B [K, N]");
  expect("mm_b3", axes({1}), "MatMul 'mm3' input B [..., K, N]");
  expect("mm_a", axes({1}), "MatMul 'mm_a_node' input A [M, K]");
  expect("gemm_bt", axes({1}), "Gemm 'gemm1' input B [N, K] (transB=1)");
  expect("gemm_at", axes({0}), "Gemm 'gemm2' input A [K, M] (transA=1)");
  expect("conv_w", axes({1, 2, 3}), "Conv 'conv' weight [out, in/groups, kernel...]");
  expect("deconv_w", axes({0, 2, 3}), "ConvTranspose 'deconv' weight [in, out/groups, kernel...]");
  expect("lstm_w", axes({2}), "LSTM 'lstm' input W");
  expect("lstm_r", axes({2}), "LSTM 'lstm' input R");
  expect("gru_w", axes({2}), "GRU #");
  expect("t_w", axes({1}), "MatMul 'mm_t' input B [K, N] via Transpose 'tr' perm [1, 0]");
  expect("t3_w", axes({0}), "via Transpose 'tr3' perm [1, 0, 2]");
  expect("t_default", axes({1}), "Gemm 'gemm_td' input B [K, N] via Transpose 'trd' perm [1, 0]");
  expect("cast_w", axes({0}), "via Cast 'cast'");
  expect("dq_w", axes({1, 2, 3}), "Conv 'conv_dq' weight [out, in/groups, kernel...] via DequantizeLinear 'dq'");
  expect("mmi_b", axes({0}), "MatMulInteger 'mmi' input B [K, N]");
  expect("qmm_b", axes({0}), "QLinearMatMul 'qmm' input B [K, N]");
  expect("qconv_w", axes({1, 2, 3}), "QLinearConv 'qconv' weight");
  CHECK_FALSE(hint_of(*c, "qconv_scale").has_value());
  expect("shared", axes({0}), "(and 1 more consumers alike)");
  // gemm_b is B of gemm0 and of gb: both [K, N].
  expect("gemm_b", axes({0}), "Gemm 'gemm0' input B [K, N]");
  CHECK_FALSE(hint_of(*c, "conflict").has_value());
  CHECK_FALSE(hint_of(*c, "custom").has_value());
  CHECK_FALSE(hint_of(*c, "bias").has_value());
  CHECK_FALSE(hint_of(*c, "unused").has_value());
}

TEST_CASE("axis hints across subgraphs, with shadowing") {
  TempDir d;
  Pb then_g = graph();
  then_g.m(1, node("MatMul", "inner_mm", {"x", "outer_w"}, {"y"}));  // uses the outer weight
  Pb else_g = graph();
  else_g.m(1, constant("shadowed", weight("", {3, 3})));  // its own "shadowed" hides the outer one
  else_g.m(1, node("Gemm", "inner_gemm", {"x", "shadowed"}, {"y"}).m(5, attr_int("transB", 1)));
  Pb g = graph();
  g.m(5, weight("outer_w", {4, 8}));
  g.m(5, weight("shadowed", {4, 8})).m(1, node("MatMul", "outer_mm", {"x", "shadowed"}, {"z"}));
  g.m(1, node("If", "if0", {"c"}, {"o"}).m(5, attr_graph("then_branch", then_g)).m(5, attr_graph("else_branch", else_g)));
  auto c = open_onnx(d.write("m.onnx", model(g)));
  auto h = hint_of(*c, "outer_w");
  REQUIRE(h);
  CHECK(h->reduce == axes({0}));
  CHECK(h->reason == "MatMul 'inner_mm' in subgraph If 'if0'/then_branch input B [K, N]");
  h = hint_of(*c, "shadowed");  // the outer one: only outer_mm counts
  REQUIRE(h);
  CHECK(h->reduce == axes({0}));
  CHECK(h->reason == "MatMul 'outer_mm' input B [K, N]");
  h = hint_of(*c, "if0/else_branch/shadowed");
  REQUIRE(h);
  CHECK(h->reduce == axes({1}));
  CHECK(h->reason.find("Gemm 'inner_gemm' in subgraph If 'if0'/else_branch input B [N, K] (transB=1)") == 0);
}

TEST_CASE("looks_like_onnx") {
  Pb g = graph();
  g.m(5, weight("w", {2}));
  const std::string m = model(g);
  auto sniff = [](const std::string& s) {
    return looks_like_onnx(reinterpret_cast<const unsigned char*>(s.data()), s.size());
  };
  CHECK(sniff(m));
  CHECK(sniff(m.substr(0, 8)));   // a head shorter than the first fields
  CHECK(sniff(m.substr(0, 2)));   // ir_version alone
  CHECK_FALSE(sniff(""));
  CHECK_FALSE(sniff(std::string("\x93NUMPY\x01\x00", 8)));          // .npy magic
  CHECK_FALSE(sniff(std::string("PK\x03\x04\x14\x00\x00\x00", 8)));  // zip
  // safetensors: an 8-byte little-endian header length, then JSON.
  CHECK_FALSE(sniff(std::string("\x08\x05\x00\x00\x00\x00\x00\x00{\"a\":1}", 15)));
  CHECK_FALSE(sniff(std::string("\x58\x00\x00\x00\x00\x00\x00\x00{\"__metadata__\":{}}", 27)));
  CHECK_FALSE(sniff("{\"weight_map\": {}}"));
  CHECK_FALSE(sniff(std::string("\x08\x00", 2)));  // ir_version 0
  CHECK_FALSE(sniff(Pb().s(7, "").b));             // a graph without ir_version first
  CHECK_FALSE(sniff(Pb().u(1, 8).raw(key(3, 3)).b));  // then a group
}

TEST_CASE("malformed files are refused with the file and the tensor named") {
  TempDir d;
  auto one = [&](const std::string& file, const Pb& t) {
    Pb g = graph();
    g.m(5, t);
    return d.write(file, model(g));
  };
  const std::string good = model(Pb(graph()).m(5, weight("w", {64, 64})));

  SUBCASE("truncated") {
    check_refused(d.write("cut.onnx", good.substr(0, good.size() / 2)), {"corrupted protobuf at byte", "declares", "but the file has"});
    check_refused(d.write("cut2.onnx", good.substr(0, 1)), {"corrupted protobuf at byte 1"});
  }
  SUBCASE("empty file, no graph") {
    check_refused(d.write("empty.onnx", ""), {"no graph"});
    check_refused(d.write("nograph.onnx", Pb().u(1, 8).s(2, "x").b), {"no graph"});
  }
  SUBCASE("a length prefix larger than the file") {
    check_refused(d.write("len.onnx", Pb().u(1, 8).raw(key(7, 2) + varint(1000) + "abc").b),
                  {"corrupted protobuf at byte 2", "declares 1000 bytes", "file has 3 left"});
  }
  SUBCASE("a 10-GB length is refused before anything is allocated") {
    const Pb t = tensor("big", FLOAT, {2500000000ull}).raw(key(T::raw_data, 2) + varint(10000000000ull));
    Pb g = graph();
    g.raw(key(5, 2) + varint(t.b.size()) + t.b);
    check_refused(d.write("big.onnx", model(g)), {"\"big\"", "declares 10000000000 bytes"});
    // The same as the model's graph length.
    check_refused(d.write("big2.onnx", Pb().u(1, 8).raw(key(7, 2) + varint(10000000000ull)).b),
                  {"declares 10000000000 bytes"});
  }
  SUBCASE("wire types 3, 4, 6 and 7") {
    for (int w : {3, 4, 6, 7}) {
      Pb g = graph();
      g.raw(key(9, w) + "xxxx");
      check_refused(d.write(fmt::format("wire{}.onnx", w), model(g)), {fmt::format("wire type {}", w)});
    }
    check_refused(one("wire_t.onnx", tensor("wt", FLOAT, {1}).raw(key(12, 3))), {"\"wt\"", "wire type 3"});
  }
  SUBCASE("a corrupted varint") {
    Pb g = graph();
    g.raw(std::string(11, '\xff'));
    check_refused(d.write("varint.onnx", model(g)), {"corrupted protobuf", "varint"});
    check_refused(one("varint_t.onnx", tensor("vt", FLOAT, {1}).raw(key(T::dims, 0) + std::string(11, '\xff'))),
                  {"\"vt\"", "varint"});
  }
  SUBCASE("sizes that do not match") {
    check_refused(one("raw.onnx", tensor("r", FLOAT, {2, 3}).s(T::raw_data, std::string(20, '\0'))),
                  {"\"r\"", "raw_data holds 20 bytes but dims [2, 3] of float32 need 24 bytes"});
    check_refused(one("fd.onnx", tensor("f", FLOAT, {3}).s(T::float_data, little_endian(std::vector<float>{1, 2}))),
                  {"\"f\"", "float_data holds 2 values but dims [3] need 3"});
    check_refused(one("fd4.onnx", tensor("f4", FLOAT, {3}).s(T::float_data, "abcde")),
                  {"\"f4\"", "not a multiple of 4"});
    check_refused(one("i32.onnx", tensor("i", FLOAT16, {3}).packed(T::int32_data, {1, 2})),
                  {"\"i\"", "int32_data holds 2 values but dims [3] need 3"});
    check_refused(one("nodata.onnx", tensor("nd", FLOAT, {5})), {"\"nd\"", "holds no data", "20 bytes"});
    check_refused(one("overflow.onnx", tensor("o", FLOAT, {1ull << 32, 1ull << 32})), {"\"o\"", "2^64"});
    check_refused(one("neg.onnx", tensor("n", FLOAT, {static_cast<std::uint64_t>(-3LL)})),
                  {"\"n\"", "negative dimension -3"});
    Pb rank = tensor("deep_rank", FLOAT, std::vector<std::uint64_t>(65, 1));
    check_refused(one("rank.onnx", rank), {"\"deep_rank\"", "more than 64 dims"});
  }
  SUBCASE("values out of range of the element type") {
    check_refused(one("h.onnx", tensor("h", FLOAT16, {1}).u(T::int32_data, 70000)),
                  {"\"h\"", "int32_data element 0 is 70000, outside the range of f16"});
    check_refused(one("i8.onnx", tensor("i8", INT8, {2}).packed(T::int32_data, {1, 200})),
                  {"\"i8\"", "element 1 is 200"});
    check_refused(one("u32.onnx", tensor("u32", UINT32, {1}).u(T::uint64_data, 1ull << 32)),
                  {"\"u32\"", "outside the range of u32"});
  }
  SUBCASE("the wrong data field or two of them") {
    check_refused(one("ff.onnx", tensor("ff", FLOAT16, {1}).f32(T::float_data, 1.0f)),
                  {"\"ff\"", "float16 tensor holds its data in float_data, which is for float32 tensors"});
    check_refused(one("two.onnx", tensor("two", FLOAT, {1}).s(T::raw_data, "abcd").f32(T::float_data, 1.0f)),
                  {"\"two\"", "both raw_data and float_data"});
  }
  SUBCASE("element types lobit does not read") {
    check_refused(one("unknown.onnx", tensor("u", 99, {1}).s(T::raw_data, "a")), {"\"u\"", "unknown data_type 99"});
    check_refused(one("undef.onnx", tensor("z", 0, {1})), {"\"z\"", "data_type 0 (undefined)"});
    check_refused(one("str.onnx", tensor("s", STRING, {1}).s(T::string_data, "hello")),
                  {"\"s\"", "data_type 8 (string) is not a type lobit reads"});
    check_refused(one("cplx.onnx", tensor("cx", COMPLEX64, {1}).s(T::raw_data, std::string(8, '\0'))),
                  {"\"cx\"", "complex64"});
    check_refused(one("int4.onnx", tensor("q", INT4, {2}).s(T::raw_data, "a")), {"\"q\"", "4-bit signed integer"});
  }
  SUBCASE("sparse tensors") {
    Pb g = graph();
    g.m(15, Pb().m(1, tensor("sp", FLOAT, {2}).s(T::raw_data, std::string(8, '\0'))).m(2, tensor("", INT64, {2})));
    check_refused(d.write("sparse.onnx", model(g)), {"\"sp\"", "sparse initializer"});
    Pb g2 = graph();
    g2.m(1, node("Constant", "", {}, {"spc"}).m(5, Pb().s(1, "sparse_value").m(22, Pb())));
    check_refused(d.write("sparse2.onnx", model(g2)), {"\"spc\"", "sparse"});
  }
  SUBCASE("subgraphs nested too deep") {
    Pb g = graph();
    g.m(5, weight("leaf", {1}));
    for (int k = 0; k < 70; ++k) {
      Pb outer = graph();
      outer.m(1, node("If", fmt::format("if{}", k), {"c"}, {"o"}).m(5, attr_graph("then_branch", g)));
      g = outer;
    }
    check_refused(d.write("deep.onnx", model(g)), {"nested deeper than 64"});
  }
  SUBCASE("an over-long name") {
    check_refused(one("name.onnx", Pb().s(T::name, std::string(70000, 'n'))), {"string of 70000 bytes"});
  }
}
