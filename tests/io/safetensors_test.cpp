// safetensors reader and writer: round trips for every dtype, files built byte by byte in
// the test (an independent writer), every malformed header the reader must refuse, sharded
// indexes, and reading a large file with bounded memory.
#include <doctest/doctest.h>
#include <fmt/format.h>
#include <sys/resource.h>

#include <cmath>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <functional>
#include <limits>
#include <nlohmann/json.hpp>
#include <string>
#include <vector>

#include "io_test_util.hpp"
#include "lobit/error.hpp"
#include "lobit/io/safetensors.hpp"

using namespace lobit;
using namespace lobit::io;
namespace fs = std::filesystem;

namespace {

struct TempDir : test::TempDir {
  TempDir() : test::TempDir("lobit-safetensors-test") {}
};
using test::write_file;

// A safetensors file assembled by hand: the 8-byte little-endian length, the header text
// as given, the data.
std::string st_bytes(const std::string& header, const std::string& data = {}) {
  std::string out;
  std::uint64_t n = header.size();
  for (int i = 0; i < 8; ++i, n >>= 8) out += static_cast<char>(n & 0xff);
  return out + header + data;
}

template <class T>
std::string raw(const std::vector<T>& v) {
  return std::string(reinterpret_cast<const char*>(v.data()), v.size() * sizeof(T));
}

// The message of the lobit::Error that f throws ("<no error>" when it throws none).
std::string error_of(const std::function<void()>& f) {
  try {
    f();
  } catch (const Error& e) {
    return e.message();
  }
  return "<no error>";
}
bool contains(const std::string& s, const std::string& part) { return s.find(part) != std::string::npos; }

std::string open_error(const std::string& path) {
  return error_of([&] { (void)open_safetensors(path); });
}

// SplitMix64 (common practice) for arbitrary bit patterns.
std::uint64_t mix(std::uint64_t x) {
  x += 0x9e3779b97f4a7c15ull;
  x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9ull;
  x = (x ^ (x >> 27)) * 0x94d049bb133111ebull;
  return x ^ (x >> 31);
}
std::vector<unsigned char> pattern(std::size_t n, std::uint64_t seed) {
  std::vector<unsigned char> v(n);
  for (std::size_t i = 0; i < n; ++i) v[i] = static_cast<unsigned char>(mix(seed * 1000003 + i) >> 56);
  return v;
}

long max_rss_kib() {
  rusage u{};
  getrusage(RUSAGE_SELF, &u);
  return u.ru_maxrss;
}

const DType kAllSafetensorsTypes[] = {DType::f64, DType::f32, DType::f16, DType::bf16, DType::f8_e4m3,
                                      DType::f8_e5m2, DType::i8, DType::u8, DType::i16, DType::u16,
                                      DType::i32, DType::u32, DType::i64, DType::u64, DType::boolean};

}  // namespace

TEST_CASE("safetensors: every dtype round-trips bit for bit through the writer") {
  TempDir dir;
  const std::string path = dir.file("all.safetensors");
  struct Item {
    PlannedTensor plan;
    std::vector<unsigned char> bytes;
  };
  std::vector<Item> items;
  std::uint64_t seed = 1;
  for (DType t : kAllSafetensorsTypes) {
    for (const std::vector<std::uint64_t>& shape :
         {std::vector<std::uint64_t>{3, 5}, std::vector<std::uint64_t>{}, std::vector<std::uint64_t>{1},
          std::vector<std::uint64_t>{2, 0, 3}, std::vector<std::uint64_t>{2, 1, 3, 1}}) {
      PlannedTensor p{fmt::format("{}.rank{}.{}", dtype_name(t), shape.size(), seed), t, shape};
      std::uint64_t count = 1;
      for (auto d : shape) count *= d;
      items.push_back({p, pattern(count * static_cast<std::uint64_t>(dtype_bytes(t)), seed++)});
    }
  }
  {
    std::vector<PlannedTensor> plan;
    for (const Item& it : items) plan.push_back(it.plan);
    SafetensorsWriter w(path, plan, {{"producer", "safetensors_test"}});
    for (const Item& it : items) w.write(it.bytes.data(), it.bytes.size());
    w.commit();
  }
  const auto ck = open_safetensors(path);
  CHECK(ck->kind() == "safetensors");
  CHECK(ck->path() == path);
  REQUIRE(ck->tensors().size() == items.size());
  for (std::size_t i = 0; i < items.size(); ++i) {
    const TensorInfo& t = ck->tensors()[i];
    CAPTURE(t.name);
    CHECK(t.name == items[i].plan.name);  // plan order is header order
    CHECK(t.dtype == items[i].plan.dtype);
    CHECK(t.shape == items[i].plan.shape);
    CHECK(t.file == path);
    CHECK_FALSE(t.big_endian);
    CHECK_FALSE(t.fortran_order);
    CHECK(t.bytes() == items[i].bytes.size());
    std::vector<unsigned char> back(items[i].bytes.size());
    ck->read_raw(i, 0, t.count(), back.data());
    CHECK(back == items[i].bytes);
    if (t.count() == 15) {  // a sub-range lands on the right bytes
      const auto w = static_cast<std::size_t>(dtype_bytes(t.dtype));
      std::vector<unsigned char> part(7 * w);
      ck->read_raw(i, 4, 7, part.data());
      CHECK(std::equal(part.begin(), part.end(), items[i].bytes.begin() + static_cast<std::ptrdiff_t>(4 * w)));
    }
  }
}

TEST_CASE("safetensors: a hand-built file converts every stored type to float32 and float64") {
  // Each tensor: dtype, shape, stored bytes (little endian), expected values.
  struct Case {
    std::string dtype;
    std::string bytes;
    std::vector<double> values;
  };
  auto u16s = [](std::vector<std::uint16_t> v) { return raw(v); };
  const double nan = std::numeric_limits<double>::quiet_NaN(), inf = std::numeric_limits<double>::infinity();
  const std::vector<Case> cases = {
      {"F64", raw(std::vector<double>{1.5, -0.1}), {1.5, -0.1}},
      {"F32", raw(std::vector<float>{3.25f, -1e-3f}), {3.25, static_cast<double>(-1e-3f)}},
      // IEEE 754-2008 binary16 (section 3.6): 0x3C00 = 1, 0xC000 = -2, 0x7BFF = 65504 (the
      // largest finite), 0x0001 = 2^-24 (the smallest subnormal), 0x7C00 = +inf (from memory).
      {"F16", u16s({0x3C00, 0xC000, 0x7BFF, 0x0001, 0x7C00}), {1, -2, 65504, std::ldexp(1.0, -24), inf}},
      // bfloat16 is the upper half of binary32 (common practice): 0x3F80 = 1, 0xC2F7 = -123.5.
      {"BF16", u16s({0x3F80, 0xC2F7}), {1, -123.5}},
      // OCP 8-bit Floating Point Specification (OFP8) rev 1.0, section 5.1, Table 1:
      // E4M3 max normal S.1111.110 = 448, min subnormal 2^-9, S.1111.111 NaN;
      // E5M2 max normal S.11110.11 = 57344, S.11111.00 infinity, min subnormal 2^-16.
      {"F8_E4M3", std::string("\x7e\x01\x7f\xfe", 4), {448, std::ldexp(1.0, -9), nan, -448}},
      {"F8_E5M2", std::string("\x7b\x7c\x01\xfc", 4), {57344, inf, std::ldexp(1.0, -16), -inf}},
      {"I8", std::string("\x80\x7f\xff", 3), {-128, 127, -1}},
      {"U8", std::string("\x00\xff", 2), {0, 255}},
      {"I16", raw(std::vector<std::int16_t>{-2, 32767}), {-2, 32767}},
      {"U16", raw(std::vector<std::uint16_t>{65535}), {65535}},
      {"I32", raw(std::vector<std::int32_t>{-100000}), {-100000}},
      {"U32", raw(std::vector<std::uint32_t>{4000000000u}), {4e9}},
      {"I64", raw(std::vector<std::int64_t>{-(std::int64_t{1} << 40)}), {-std::ldexp(1.0, 40)}},
      {"U64", raw(std::vector<std::uint64_t>{std::uint64_t{1} << 63}), {std::ldexp(1.0, 63)}},
      {"BOOL", std::string("\x00\x01", 2), {0, 1}},
  };
  // Hand-written header: names in reverse offset order, metadata last, a run of padding.
  std::string header = "{", data;
  std::vector<std::uint64_t> begin(cases.size());
  for (std::size_t k = 0; k < cases.size(); ++k) {
    begin[k] = data.size();
    data += cases[k].bytes;
  }
  for (std::size_t k = cases.size(); k-- > 0;) {
    header += fmt::format("\"t{}\": {{\"shape\": [{}], \"data_offsets\": [{}, {}], \"dtype\": \"{}\"}}, ", k,
                          cases[k].values.size(), begin[k], begin[k] + cases[k].bytes.size(), cases[k].dtype);
  }
  header += "\"__metadata__\": {\"format\": \"pt\"}}        ";
  TempDir dir;
  const std::string path = dir.file("hand.safetensors");
  write_file(path, st_bytes(header, data));

  const auto ck = open_safetensors(path);
  REQUIRE(ck->tensors().size() == cases.size());
  for (std::size_t k = 0; k < cases.size(); ++k) {
    const std::size_t i = cases.size() - 1 - k;  // listed in header order
    const TensorInfo& t = ck->tensors()[i];
    CAPTURE(cases[k].dtype);
    CHECK(t.name == fmt::format("t{}", k));
    CHECK(write_dtype_name(t.dtype) == cases[k].dtype);
    CHECK(parse_safetensors_dtype(cases[k].dtype) == t.dtype);
    const std::size_t n = cases[k].values.size();
    std::vector<double> f64(n);
    std::vector<float> f32(n);
    ck->read_f64(i, 0, n, f64.data());
    ck->read_f32(i, 0, n, f32.data());
    for (std::size_t j = 0; j < n; ++j) {
      CAPTURE(j);
      const double want = cases[k].values[j];
      if (std::isnan(want)) {
        CHECK(std::isnan(f64[j]));
        CHECK(std::isnan(f32[j]));
      } else {
        CHECK(f64[j] == want);
        CHECK(f32[j] == static_cast<float>(want));
      }
    }
  }
}

TEST_CASE("safetensors: the writer's header is JSON in plan order, padded to 8 bytes") {
  TempDir dir;
  const std::string path = dir.file("layout.safetensors");
  const std::vector<PlannedTensor> plan = {
      {"z.last", DType::bf16, {2, 3}}, {"a.first", DType::f32, {4}}, {"m\"quote\\", DType::u8, {}}};
  {
    SafetensorsWriter w(path, plan, {{"k1", "v1"}, {"note", "\xc3\xa9t\xc3\xa9"}});
    const std::vector<unsigned char> bytes(12 + 16 + 1, 0x5a);
    w.write(bytes.data(), 5);  // pieces need not follow tensor boundaries
    w.write(bytes.data() + 5, bytes.size() - 5);
    CHECK(w.data_bytes() == 29);
    CHECK(w.header_bytes() % 8 == 0);
    w.commit();
  }
  std::ifstream f(path, std::ios::binary);
  std::string all((std::istreambuf_iterator<char>(f)), std::istreambuf_iterator<char>());
  std::uint64_t n = 0;
  for (int i = 7; i >= 0; --i) n = (n << 8) | static_cast<unsigned char>(all[static_cast<std::size_t>(i)]);
  CHECK(n % 8 == 0);
  CHECK(all.size() == 8 + n + 29);
  const std::string header = all.substr(8, n);
  CHECK(header.front() == '{');
  const auto last = header.find_last_not_of(' ');
  CHECK(header[last] == '}');
  const auto j = nlohmann::ordered_json::parse(header);
  std::vector<std::string> keys;
  for (const auto& [k, v] : j.items()) keys.push_back(k);
  CHECK(keys == std::vector<std::string>{"__metadata__", "z.last", "a.first", "m\"quote\\"});
  CHECK(j["__metadata__"]["k1"].get<std::string>() == "v1");
  CHECK(j["__metadata__"]["note"].get<std::string>() == "\xc3\xa9t\xc3\xa9");
  CHECK(j["z.last"]["dtype"].get<std::string>() == "BF16");
  CHECK(j["z.last"]["shape"] == nlohmann::ordered_json::array({2, 3}));
  CHECK(j["z.last"]["data_offsets"] == nlohmann::ordered_json::array({0, 12}));
  CHECK(j["a.first"]["data_offsets"] == nlohmann::ordered_json::array({12, 28}));
  CHECK(j["m\"quote\\"]["shape"] == nlohmann::ordered_json::array());
  CHECK(j["m\"quote\\"]["data_offsets"] == nlohmann::ordered_json::array({28, 29}));
}

TEST_CASE("safetensors: the writer refuses misuse and leaves nothing behind") {
  TempDir dir;
  const std::string path = dir.file("w.safetensors");
  auto folder_is_empty = [&] { return fs::is_empty(dir.path); };
  CHECK(contains(error_of([&] { SafetensorsWriter(path, {{"a", DType::f32, {1}}, {"a", DType::f32, {2}}}); }),
                 "tensor \"a\" is planned twice"));
  CHECK(contains(error_of([&] { SafetensorsWriter(path, {{"__metadata__", DType::f32, {1}}}); }),
                 "\"__metadata__\" is reserved"));
  CHECK(contains(error_of([&] { SafetensorsWriter(path, {{"x", DType::f8_e4m3_nz, {1}}}); }),
                 "safetensors has no dtype for f8-e4m3-nz"));
  CHECK(contains(error_of([&] { SafetensorsWriter(path, {{"x", DType::f32, {std::uint64_t{1} << 62, 8}}}); }),
                 "larger than 2^64 bytes"));
  CHECK(contains(error_of([&] { SafetensorsWriter(path, {{"bad\xff", DType::f32, {1}}}); }), "not valid UTF-8"));
  CHECK(folder_is_empty());

  const float v[3] = {1, 2, 3};
  {
    SafetensorsWriter w(path, {{"x", DType::f32, {2}}});
    w.write(v, 4);
    bool internal = false;
    try {
      w.commit();
    } catch (const Error& e) {
      internal = e.kind() == Error::Kind::internal && contains(e.message(), "4 of the plan's 8 data bytes");
    }
    CHECK(internal);
    const std::string over = error_of([&] { w.write(v, 8); });
    CHECK(contains(over, "4 more bytes written than the plan's 8"));
  }
  CHECK(folder_is_empty());  // no partial file under the final name, no temporary left
  {
    SafetensorsWriter w(path, {{"x", DType::f32, {2}}});
    w.write(v, 8);
  }  // destroyed without commit()
  CHECK(folder_is_empty());
}

TEST_CASE("safetensors: a header of several MiB is read across chunk boundaries") {
  TempDir dir;
  const std::string path = dir.file("many.safetensors");
  std::vector<PlannedTensor> plan;
  const std::string long_part(60, 'x');
  for (int i = 0; i < 40000; ++i) plan.push_back({fmt::format("layer.{}.{}", i, long_part), DType::u16, {1}});
  {
    SafetensorsWriter w(path, plan);
    CHECK(w.header_bytes() > (std::uint64_t{3} << 20));
    for (int i = 0; i < 40000; ++i) {
      const auto v = static_cast<std::uint16_t>(i);
      w.write(&v, 2);
    }
    w.commit();
  }
  const auto ck = open_safetensors(path);
  REQUIRE(ck->tensors().size() == 40000);
  for (int i : {0, 1, 12345, 39999}) {
    CHECK(ck->tensors()[static_cast<std::size_t>(i)].name == plan[static_cast<std::size_t>(i)].name);
    double x = -1;
    ck->read_f64(static_cast<std::size_t>(i), 0, 1, &x);
    CHECK(x == i);
  }
}

TEST_CASE("safetensors: sniffing") {
  const std::string good = st_bytes("{\"a\":{}}");
  const auto* p = reinterpret_cast<const unsigned char*>(good.data());
  CHECK(looks_like_safetensors(p, good.size(), good.size()));
  CHECK_FALSE(looks_like_safetensors(p, good.size(), good.size() - 1));  // the header would pass the end
  CHECK_FALSE(looks_like_safetensors(p, 8, good.size()));                // the '{' is not in view
  const std::string json = "{\"weight_map\": {}}";
  CHECK_FALSE(looks_like_safetensors(reinterpret_cast<const unsigned char*>(json.data()), json.size(), json.size()));
  const std::string not_brace = st_bytes("[1,2,3]");
  CHECK_FALSE(looks_like_safetensors(reinterpret_cast<const unsigned char*>(not_brace.data()), not_brace.size(),
                                     not_brace.size()));
}

TEST_CASE("safetensors: malformed files are refused with the file, the tensor and the problem") {
  TempDir dir;
  const std::string path = dir.file("model.safetensors");
  auto refuse = [&](const std::string& bytes) {
    write_file(path, bytes);
    const std::string m = open_error(path);
    CHECK_MESSAGE(contains(m, path + ": "), m);  // the file is named first
    return m;
  };
  const std::string f32x2 = "\"dtype\":\"F32\",\"shape\":[2]";
  const std::string eight(8, '\0');

  SUBCASE("truncated: fewer bytes than the length field") {
    const std::string m = refuse(std::string("\x10\x00\x00", 3));
    CHECK_MESSAGE(contains(m, "the file has 3 bytes, fewer than the 8-byte header length"), m);
  }
  SUBCASE("truncated: the header passes the end of the file") {
    const std::string full = st_bytes("{\"a\":{" + f32x2 + ",\"data_offsets\":[0,8]}}", eight);
    const std::string m = refuse(full.substr(0, 20));
    CHECK_MESSAGE(contains(m, fmt::format("the header length field says {} bytes but only 12 bytes follow it",
                                          full.size() - 16)),
                  m);
  }
  SUBCASE("a 10-GB header length in a small file") {
    std::string b = st_bytes("{}");
    const std::uint64_t ten_gb = 10'000'000'000ull;
    for (int i = 0; i < 8; ++i) b[static_cast<std::size_t>(i)] = static_cast<char>((ten_gb >> (8 * i)) & 0xff);
    const std::string m = refuse(b);
    CHECK_MESSAGE(contains(m, "says 10000000000 bytes but only 2 bytes follow it"), m);
  }
  SUBCASE("a 10-GB header length in a file that long: refused before anything is allocated") {
    std::string b = st_bytes("{}");
    const std::uint64_t ten_gb = 10'000'000'000ull;
    for (int i = 0; i < 8; ++i) b[static_cast<std::size_t>(i)] = static_cast<char>((ten_gb >> (8 * i)) & 0xff);
    write_file(path, b);
    std::error_code ec;
    fs::resize_file(path, ten_gb + 64, ec);  // sparse: no disk blocks
    if (ec) {
      MESSAGE("no sparse file here: " << ec.message());
    } else {
      const long before = max_rss_kib();
      const std::string m = open_error(path);
      CHECK_MESSAGE(contains(m, "the header length field says 10000000000 bytes, more than the 100 MiB"), m);
      CHECK(max_rss_kib() - before < 64 * 1024);
    }
  }
  SUBCASE("a zero header length") {
    const std::string m = refuse(std::string(8, '\0') + "{}");
    CHECK_MESSAGE(contains(m, "the header length field is 0"), m);
  }
  SUBCASE("malformed JSON, with nlohmann's byte position") {
    const std::string m = refuse(st_bytes("{\"a\":{\"dtype\":\"F32\",,}}"));
    CHECK_MESSAGE(contains(m, "the header is not valid JSON at byte 21"), m);
  }
  SUBCASE("invalid UTF-8 in a name") {
    const std::string m = refuse(st_bytes("{\"a\xff\":{" + f32x2 + ",\"data_offsets\":[0,8]}}", eight));
    CHECK_MESSAGE(contains(m, "is not valid JSON"), m);
  }
  SUBCASE("the header is not an object") {
    const std::string m = refuse(st_bytes("[1, 2]"));
    CHECK_MESSAGE(contains(m, "the header is an array, not a JSON object"), m);
  }
  SUBCASE("an unknown dtype") {
    const std::string m = refuse(st_bytes("{\"w\":{\"dtype\":\"F4\",\"shape\":[2],\"data_offsets\":[0,1]}}", "x"));
    CHECK_MESSAGE(contains(m, "tensor \"w\": dtype \"F4\" is not one lobit reads"), m);
    CHECK_MESSAGE(contains(m, "F64, F32, F16, BF16, F8_E4M3, F8_E5M2"), m);
  }
  SUBCASE("the offsets pass the end of the data") {
    const std::string m = refuse(st_bytes("{\"w\":{" + f32x2 + ",\"data_offsets\":[4,12]}}", eight));
    CHECK_MESSAGE(contains(m, "tensor \"w\": data_offsets [4, 12] pass the end of the data, which has 8 bytes"), m);
  }
  SUBCASE("overlapping offsets") {
    const std::string m = refuse(st_bytes("{\"a\":{" + f32x2 + ",\"data_offsets\":[0,8]},\"b\":{" + f32x2 +
                                              ",\"data_offsets\":[4,12]}}",
                                          std::string(12, '\0')));
    CHECK_MESSAGE(contains(m, "tensors \"a\" (data_offsets [0, 8]) and \"b\" ([4, 12]) overlap"), m);
  }
  SUBCASE("shape x dtype does not match the byte count") {
    const std::string m = refuse(st_bytes(
        "{\"layers.0.w\":{\"dtype\":\"F32\",\"shape\":[10,20],\"data_offsets\":[0,400]}}", std::string(400, '\0')));
    CHECK_MESSAGE(contains(m, "tensor \"layers.0.w\": data_offsets [0, 400] hold 400 bytes but F32 [10, 20] needs "
                              "800 (the header and the data disagree; the file may be corrupt)"),
                  m);
  }
  SUBCASE("an empty tensor must hold no bytes") {
    const std::string m =
        refuse(st_bytes("{\"e\":{\"dtype\":\"F32\",\"shape\":[0,3],\"data_offsets\":[0,4]}}", std::string(4, '\0')));
    CHECK_MESSAGE(contains(m, "data_offsets [0, 4] hold 4 bytes but F32 [0, 3] needs 0"), m);
  }
  SUBCASE("offsets that end before they begin") {
    const std::string m = refuse(st_bytes("{\"w\":{" + f32x2 + ",\"data_offsets\":[8,0]}}", eight));
    CHECK_MESSAGE(contains(m, "data_offsets [8, 0] end before they begin"), m);
  }
  SUBCASE("a shape whose byte count overflows") {
    const std::string m = refuse(st_bytes(
        "{\"w\":{\"dtype\":\"F32\",\"shape\":[4294967296,4294967296],\"data_offsets\":[0,8]}}", eight));
    CHECK_MESSAGE(contains(m, "tensor \"w\": F32 [4294967296, 4294967296] needs more than 2^64 bytes"), m);
  }
  SUBCASE("a negative or fractional shape entry") {
    std::string m = refuse(st_bytes("{\"w\":{\"dtype\":\"F32\",\"shape\":[2,-1],\"data_offsets\":[0,8]}}", eight));
    CHECK_MESSAGE(contains(m, "tensor \"w\": shape entry 1 is a negative integer, not a non-negative integer"), m);
    m = refuse(st_bytes("{\"w\":{\"dtype\":\"F32\",\"shape\":[2.0],\"data_offsets\":[0,8]}}", eight));
    CHECK_MESSAGE(contains(m, "shape entry 0 is a number with a fraction or an exponent"), m);
  }
  SUBCASE("wrong types and missing keys") {
    std::string m = refuse(st_bytes("{\"w\":{\"dtype\":32,\"shape\":[2],\"data_offsets\":[0,8]}}", eight));
    CHECK_MESSAGE(contains(m, "tensor \"w\": dtype is an integer, not a string"), m);
    m = refuse(st_bytes("{\"w\":{\"dtype\":\"F32\",\"shape\":2,\"data_offsets\":[0,8]}}", eight));
    CHECK_MESSAGE(contains(m, "tensor \"w\": shape is an integer, not an array of integers"), m);
    m = refuse(st_bytes("{\"w\":{\"dtype\":\"F32\",\"shape\":[2],\"data_offsets\":[0,8,9]}}", eight));
    CHECK_MESSAGE(contains(m, "data_offsets must be two integers [begin, end]"), m);
    m = refuse(st_bytes("{\"w\":{\"dtype\":\"F32\",\"shape\":[2],\"data_offsets\":[8]}}", eight));
    CHECK_MESSAGE(contains(m, "data_offsets must be two non-negative integers [begin, end]"), m);
    m = refuse(st_bytes("{\"w\":{\"dtype\":\"F32\",\"data_offsets\":[0,8]}}", eight));
    CHECK_MESSAGE(contains(m, "tensor \"w\": the entry has no \"shape\""), m);
    m = refuse(st_bytes("{\"w\":[1]}", eight));
    CHECK_MESSAGE(contains(m, "tensor \"w\": the entry is an array, not an object"), m);
    m = refuse(st_bytes("{\"w\":{" + f32x2 + ",\"dtype\":\"F32\",\"data_offsets\":[0,8]}}", eight));
    CHECK_MESSAGE(contains(m, "tensor \"w\": the entry has \"dtype\" twice"), m);
  }
  SUBCASE("a name given twice") {
    const std::string m = refuse(st_bytes("{\"w\":{" + f32x2 + ",\"data_offsets\":[0,8]},\"w\":{" + f32x2 +
                                              ",\"data_offsets\":[8,16]}}",
                                          eight + eight));
    CHECK_MESSAGE(contains(m, "tensor \"w\" appears twice in the header"), m);
  }
  SUBCASE("metadata that is not strings") {
    const std::string m = refuse(st_bytes("{\"__metadata__\":{\"step\":1000}}"));
    CHECK_MESSAGE(contains(m, "\"__metadata__\" value for key \"step\" is an integer, not a string"), m);
  }
  SUBCASE("too many axes") {
    std::string shape = "[1";
    for (int i = 1; i < 65; ++i) shape += ",1";
    const std::string m =
        refuse(st_bytes("{\"w\":{\"dtype\":\"U8\",\"shape\":" + shape + "],\"data_offsets\":[0,1]}}", "x"));
    CHECK_MESSAGE(contains(m, "tensor \"w\": the shape has more than 64 axes"), m);
  }
  SUBCASE("control characters in a name are escaped in the message") {
    const std::string m = refuse(st_bytes("{\"a\\nb\":{\"dtype\":\"Q\",\"shape\":[],\"data_offsets\":[0,0]}}"));
    CHECK_MESSAGE(contains(m, "tensor \"a\\nb\""), m);
    CHECK(m.find('\n') == std::string::npos);
  }
}

TEST_CASE("safetensors: accepted oddities: unknown entry keys, empty tensors, gaps, no tensors") {
  TempDir dir;
  const std::string path = dir.file("odd.safetensors");
  write_file(path, st_bytes("{\"e\":{\"dtype\":\"F16\",\"shape\":[4,0],\"data_offsets\":[3,3]},"
                            "\"w\":{\"extra\":{\"nested\":[1,{\"x\":null}]},\"dtype\":\"U8\",\"shape\":[2],"
                            "\"data_offsets\":[5,7]}}",
                            "0123456789"));
  const auto ck = open_safetensors(path);
  REQUIRE(ck->tensors().size() == 2);
  CHECK(ck->tensors()[0].name == "e");
  CHECK(ck->tensors()[0].count() == 0);  // listed; consumers refuse to score it
  CHECK(ck->tensors()[0].shape_text() == "[4, 0]");
  double v[2];
  ck->read_f64(1, 0, 2, v);
  CHECK(v[0] == '5');
  CHECK(v[1] == '6');
  write_file(path, st_bytes("{\"__metadata__\":{\"a\":\"b\"}}  "));
  CHECK(open_safetensors(path)->tensors().empty());
}

TEST_CASE("safetensors: sharded checkpoints through the index's weight_map") {
  TempDir dir;
  fs::create_directory(dir.path / "sub");
  auto shard = [&](const std::string& name, const std::vector<PlannedTensor>& plan, float base) {
    SafetensorsWriter w(dir.file(name), plan);
    for (std::size_t k = 0; k < plan.size(); ++k) {
      std::vector<float> v(plan[k].shape.empty() ? 1 : plan[k].shape[0]);
      for (std::size_t j = 0; j < v.size(); ++j) v[j] = base + static_cast<float>(10 * k + j);
      w.write(v.data(), v.size() * 4);
    }
    w.commit();
  };
  shard("model-1.safetensors", {{"a", DType::f32, {3}}, {"b", DType::f32, {2}}}, 100);
  shard("sub/model-2.safetensors", {{"c", DType::f32, {4}}, {"extra", DType::f32, {1}}}, 200);
  const std::string index = dir.file("model.safetensors.index.json");

  SUBCASE("every tensor of every shard is listed, files are the shards") {
    write_file(index,
               "{\n  \"metadata\": {\"total_size\": 40, \"nested\": [1, {\"x\": 2}]},\n  \"weight_map\": {\n"
               "    \"c\": \"sub/model-2.safetensors\",\n    \"a\": \"model-1.safetensors\",\n"
               "    \"b\": \"model-1.safetensors\"\n  }\n}\n");
    const auto ck = open_safetensors(index);
    CHECK(ck->path() == index);
    CHECK(ck->kind() == "safetensors");
    REQUIRE(ck->tensors().size() == 4);
    // Shards in the order the map first names them, tensors in header order.
    CHECK(ck->tensors()[0].name == "c");
    CHECK(ck->tensors()[1].name == "extra");
    CHECK(ck->tensors()[2].name == "a");
    CHECK(ck->tensors()[3].name == "b");
    CHECK(ck->tensors()[0].file == dir.file("sub/model-2.safetensors"));
    CHECK(ck->tensors()[2].file == dir.file("model-1.safetensors"));
    CHECK(contains(ck->tensors()[1].origin, "not in the index"));
    CHECK_FALSE(contains(ck->tensors()[0].origin, "not in the index"));
    float v[4];
    ck->read_f32(0, 0, 4, v);
    CHECK(v[3] == 203);
    ck->read_f32(3, 0, 2, v);
    CHECK(v[0] == 110);
    CHECK(v[1] == 111);
  }
  SUBCASE("the index names a shard that is missing") {
    write_file(index, "{\"weight_map\": {\"a\": \"model-1.safetensors\", \"z\": \"model-3.safetensors\"}}");
    const std::string m = open_error(index);
    CHECK_MESSAGE(contains(m, index + ": the shard \"model-3.safetensors\" named by the index cannot be read"), m);
  }
  SUBCASE("the index maps a tensor its shard lacks") {
    write_file(index, "{\"weight_map\": {\"a\": \"model-1.safetensors\", \"c\": \"model-1.safetensors\"}}");
    const std::string m = open_error(index);
    CHECK_MESSAGE(contains(m, "the index maps tensor \"c\" to the shard \"model-1.safetensors\", which has no such "
                              "tensor"),
                  m);
  }
  SUBCASE("a tensor in two shards") {
    shard("dup.safetensors", {{"a", DType::f32, {1}}}, 0);
    write_file(index, "{\"weight_map\": {\"a\": \"model-1.safetensors\", \"q\": \"dup.safetensors\"}}");
    const std::string m = open_error(index);
    CHECK_MESSAGE(contains(m, "the index maps tensor \"q\" to the shard \"dup.safetensors\""), m);
    write_file(index, "{\"weight_map\": {\"b\": \"model-1.safetensors\", \"a\": \"dup.safetensors\"}}");
    const std::string m2 = open_error(index);
    CHECK_MESSAGE(contains(m2, "tensor \"a\" is in both shard \"model-1.safetensors\" and shard \"dup.safetensors\""),
                  m2);
  }
  SUBCASE("shard names outside the index's folder") {
    write_file(index, "{\"weight_map\": {\"a\": \"../model-1.safetensors\"}}");
    CHECK(contains(open_error(index), "which is not a file name in or below the index's folder"));
    write_file(index, "{\"weight_map\": {\"a\": \"/etc/model-1.safetensors\"}}");
    CHECK(contains(open_error(index), "which is not a file name in or below the index's folder"));
  }
  SUBCASE("JSON that is not an index") {
    write_file(index, "{\"metadata\": {}}");
    CHECK(contains(open_error(index), "has no \"weight_map\", so it is not a sharded safetensors index"));
    write_file(index, "{\"weight_map\": {\"a\": 3}}");
    CHECK(contains(open_error(index), "\"weight_map\" maps tensor \"a\" to an integer, not a shard file name"));
    write_file(index, "{\"weight_map\": {}}");
    CHECK(contains(open_error(index), "lists no tensors"));
    write_file(index, "{\"weight_map\": {\"a\": \"model-1.safetensors\"");
    CHECK(contains(open_error(index), "the index is not valid JSON at byte"));
  }
  SUBCASE("a corrupt shard is reported under its own name") {
    write_file(dir.file("model-1.safetensors"), std::string("\x05\x00", 2));
    write_file(index, "{\"weight_map\": {\"a\": \"model-1.safetensors\"}}");
    const std::string m = open_error(index);
    CHECK_MESSAGE(contains(m, dir.file("model-1.safetensors") + ": the file has 2 bytes"), m);
  }
}

TEST_CASE("safetensors: a 320 MB file is read in chunks with bounded memory") {
  TempDir dir;
  const std::string path = dir.file("big.safetensors");
  constexpr std::uint64_t rows = 80, cols = std::uint64_t{1} << 20;  // 80 Mi float32 = 320 MiB
  std::vector<float> row(cols);
  auto value = [](std::uint64_t r, std::uint64_t c) { return static_cast<float>((r * 7 + c) % 1000) - 500.0f; };
  const long before = max_rss_kib();
  {
    SafetensorsWriter w(path, {{"small", DType::f16, {2}}, {"big", DType::f32, {rows, cols}}});
    const std::uint16_t h[2] = {0x3C00, 0x4000};
    w.write(h, 4);
    for (std::uint64_t r = 0; r < rows; ++r) {
      for (std::uint64_t c = 0; c < cols; ++c) row[c] = value(r, c);
      w.write(row.data(), cols * 4);
    }
    w.commit();
  }
  const auto ck = open_safetensors(path);
  REQUIRE(ck->tensors()[1].bytes() == rows * cols * 4);
  bool all_equal = true;
  std::vector<double> chunk(cols / 4);
  for (std::uint64_t first = 0; first < rows * cols; first += chunk.size()) {
    ck->read_f64(1, first, chunk.size(), chunk.data());
    for (std::size_t k = 0; k < chunk.size(); ++k) {
      const std::uint64_t e = first + k;
      all_equal = all_equal && chunk[k] == value(e / cols, e % cols);
    }
  }
  CHECK(all_equal);
  const long growth_kib = max_rss_kib() - before;
  MESSAGE("peak RSS growth: " << growth_kib / 1024 << " MiB");
  CHECK(growth_kib < 100 * 1024);
}
