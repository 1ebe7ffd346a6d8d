// .npy and .npz: writer round trips, .npy files built byte by byte in the test (every
// version, byte order and dict spelling the reader takes), .npz archives written by
// Python's zipfile (tests/io/make_fixtures.py: stored, deflated, zip64, corrupt), and the
// malformed inputs the readers must refuse.
#include <doctest/doctest.h>
#include <fmt/format.h>

#include <cmath>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <functional>
#include <numbers>
#include <string>
#include <thread>
#include <vector>

#include "io_test_util.hpp"
#include "lobit/error.hpp"
#include "lobit/io/numpy.hpp"

// The build passes the interpreter CMake found; other builds (the sanitizer build of
// tests/fuzz) take python3 from PATH and the script beside this file.
#ifndef LOBIT_PYTHON
#define LOBIT_PYTHON "python3"
#endif
#ifndef LOBIT_NPZ_FIXTURES
#define LOBIT_NPZ_FIXTURES (std::filesystem::path(__FILE__).parent_path() / "make_fixtures.py").string()
#endif

using namespace lobit;
using namespace lobit::io;
namespace fs = std::filesystem;

namespace {

struct TempDir : test::TempDir {
  TempDir() : test::TempDir("lobit-numpy-test") {}
};
using test::write_file;

std::string read_file(const std::string& path) {
  std::ifstream f(path, std::ios::binary);
  return std::string((std::istreambuf_iterator<char>(f)), std::istreambuf_iterator<char>());
}

std::string error_of(const std::function<void()>& f) {
  try {
    f();
  } catch (const Error& e) {
    return e.message();
  }
  return "<no error>";
}
bool contains(const std::string& s, const std::string& part) { return s.find(part) != std::string::npos; }

// A .npy file by hand (the layout of NumPy's format documentation, from memory): magic,
// major, minor, a little-endian u16 (version 1) or u32 (versions 2, 3) header length,
// the dict text as given (padded with spaces and '\n' to a multiple of 64), the data.
std::string npy_bytes(const std::string& dict, const std::string& data, int major = 1, bool pad = true) {
  const std::size_t len_bytes = major == 1 ? 2 : 4;
  std::string text = dict;
  if (pad) {
    text.append((64 - (8 + len_bytes + text.size() + 1) % 64) % 64, ' ');
    text += '\n';
  }
  std::string out = "\x93NUMPY";
  out += static_cast<char>(major);
  out += '\0';
  std::uint64_t n = text.size();
  for (std::size_t i = 0; i < len_bytes; ++i, n >>= 8) out += static_cast<char>(n & 0xff);
  return out + text + data;
}

template <class T>
std::string raw(const std::vector<T>& v, bool big_endian = false) {
  std::string s;
  for (const T& x : v) {
    std::string b(sizeof(T), '\0');
    std::memcpy(b.data(), &x, sizeof(T));
    if (big_endian) std::reverse(b.begin(), b.end());
    s += b;
  }
  return s;
}

std::vector<double> read_all(const Checkpoint& ck, std::size_t i) {
  std::vector<double> v(static_cast<std::size_t>(ck.tensors().at(i).count()));
  ck.read_f64(i, 0, v.size(), v.data());
  return v;
}

// a[i] = 0.5 i - 2, the values of the fixtures' a.npy and of several hand-built files.
std::vector<float> ramp(std::size_t n) {
  std::vector<float> v(n);
  for (std::size_t i = 0; i < n; ++i) v[i] = 0.5f * static_cast<float>(i) - 2.0f;
  return v;
}
std::vector<double> as_double(const std::vector<float>& v) { return std::vector<double>(v.begin(), v.end()); }

// The .npz fixtures, written once per run by Python's zipfile.
const fs::path& fixtures() {
  static TempDir dir;
  static bool made = false;
  if (!made) {
    const std::string cmd = fmt::format("\"{}\" \"{}\" \"{}\"", LOBIT_PYTHON, LOBIT_NPZ_FIXTURES, dir.path.string());
    REQUIRE_MESSAGE(std::system(cmd.c_str()) == 0, cmd);
    made = true;
  }
  return dir.path;
}
std::string fixture(const std::string& name) { return (fixtures() / name).string(); }

const DType kNpyTypes[] = {DType::f64, DType::f32, DType::f16, DType::i8,  DType::u8,  DType::i16,
                           DType::u16, DType::i32, DType::u32, DType::i64, DType::u64, DType::boolean};

}  // namespace

TEST_CASE("npy: the writer round-trips every NumPy type bit for bit") {
  TempDir dir;
  int seed = 0;
  for (DType t : kNpyTypes) {
    for (const std::vector<std::uint64_t>& shape :
         {std::vector<std::uint64_t>{3, 5}, std::vector<std::uint64_t>{}, std::vector<std::uint64_t>{1},
          std::vector<std::uint64_t>{2, 0}, std::vector<std::uint64_t>{7}}) {
      CAPTURE(dtype_name(t));
      CAPTURE(shape.size());
      std::uint64_t count = 1;
      for (auto d : shape) count *= d;
      std::vector<unsigned char> bytes(count * static_cast<std::uint64_t>(dtype_bytes(t)));
      for (std::size_t i = 0; i < bytes.size(); ++i) bytes[i] = static_cast<unsigned char>((i * 37 + 11 * ++seed) >> 1);
      const std::string path = dir.file(fmt::format("arr{}.npy", seed));
      {
        NpyWriter w(path, t, shape);
        CHECK(w.header_bytes() % 64 == 0);  // NumPy's format documentation: data aligned to 64 bytes
        w.write(bytes.data(), bytes.size());
        w.commit();
      }
      const std::string file = read_file(path);
      CHECK(file.substr(0, 8) == std::string("\x93NUMPY\x01\x00", 8));
      const std::size_t hlen = static_cast<unsigned char>(file[8]) | (static_cast<unsigned char>(file[9]) << 8);
      CHECK((10 + hlen) % 64 == 0);
      CHECK(file[10 + hlen - 1] == '\n');
      const auto ck = open_npy(path);
      CHECK(ck->kind() == "npy");
      REQUIRE(ck->tensors().size() == 1);
      const TensorInfo& ti = ck->tensors()[0];
      CHECK(ti.name == fmt::format("arr{}", seed));
      CHECK(ti.dtype == t);
      CHECK(ti.shape == shape);
      CHECK_FALSE(ti.big_endian);
      CHECK_FALSE(ti.fortran_order);
      std::vector<unsigned char> back(bytes.size());
      ck->read_raw(0, 0, ti.count(), back.data());
      CHECK(back == bytes);
    }
  }
}

TEST_CASE("npy: the writer's header is the dict NumPy's documentation shows") {
  TempDir dir;
  const std::string path = dir.file("h.npy");
  NpyWriter w(path, DType::f32, {3, 4});
  std::vector<float> v = ramp(12);
  w.write(v.data(), 48);
  w.commit();
  const std::string file = read_file(path);
  // NumPy's format documentation (from memory): "{'descr': '<f4', 'fortran_order': False,
  // 'shape': (3, 4), }" then spaces and '\n'.
  const std::string dict = "{'descr': '<f4', 'fortran_order': False, 'shape': (3, 4), }";
  CHECK(file.substr(10, dict.size()) == dict);
  // 10 + 60 + 1 bytes, padded to the next multiple of 64.
  CHECK(file.find_first_not_of(' ', 10 + dict.size()) == 127);
  CHECK(file[127] == '\n');
  CHECK(file.size() == 128 + 48);
  CHECK(npy_descr(DType::u8) == "|u1");
  CHECK(npy_descr(DType::i64) == "<i8");
  CHECK(npy_descr(DType::boolean) == "|b1");
  // 1-D and scalar tuples.
  NpyWriter w1(dir.file("one.npy"), DType::i8, {5});
  const char five[5] = {};
  w1.write(five, 5);
  w1.commit();
  CHECK(contains(read_file(dir.file("one.npy")), "'shape': (5,), }"));
  NpyWriter w0(dir.file("zero.npy"), DType::f64, {});
  const double x = 1;
  w0.write(&x, 8);
  w0.commit();
  CHECK(contains(read_file(dir.file("zero.npy")), "'shape': (), }"));
}

TEST_CASE("npy: the writer refuses types NumPy lacks and misuse") {
  TempDir dir;
  for (DType t : {DType::bf16, DType::f8_e4m3, DType::f8_e5m2, DType::f8_e4m3_nz, DType::f8_e5m2_nz}) {
    const std::string m = error_of([&] { NpyWriter(dir.file("x.npy"), t, {2}); });
    CHECK_MESSAGE(contains(m, fmt::format("NumPy has no type for {}", dtype_name(t))), m);
    CHECK_MESSAGE(contains(m, "write the bit patterns as u16 (bf16) or u8"), m);
  }
  {
    NpyWriter w(dir.file("x.npy"), DType::u16, {2});
    const std::uint16_t v[3] = {};
    CHECK(contains(error_of([&] { w.write(v, 6); }), "2 more bytes written than the array's 4"));
    w.write(v, 2);
    CHECK(contains(error_of([&] { w.commit(); }), "2 of the array's 4 data bytes were written"));
  }
  CHECK(fs::is_empty(dir.path));
}

TEST_CASE("npy: hand-built files of every version, byte order and dict spelling") {
  TempDir dir;
  const std::string path = dir.file("w.npy");
  auto open = [&](const std::string& bytes) {
    write_file(path, bytes);
    return open_npy(path);
  };
  const std::vector<float> a = ramp(12);
  const std::string f4_34 = "{'descr': '<f4', 'fortran_order': False, 'shape': (3, 4), }";
  for (int major : {1, 2, 3}) {
    CAPTURE(major);
    const auto ck = open(npy_bytes(f4_34, raw(a), major));
    const TensorInfo& t = ck->tensors()[0];
    CHECK(t.name == "w");
    CHECK(t.dtype == DType::f32);
    CHECK(t.shape == std::vector<std::uint64_t>{3, 4});
    CHECK(contains(t.origin, fmt::format("version {}.0", major)));
    CHECK(read_all(*ck, 0) == as_double(a));
  }
  SUBCASE("big endian") {
    const std::vector<double> d = {1.5, -2.25, 1e300};
    auto ck = open(npy_bytes("{'descr': '>f8', 'fortran_order': False, 'shape': (3,), }", raw(d, true)));
    CHECK(ck->tensors()[0].big_endian);
    CHECK(read_all(*ck, 0) == d);
    const std::vector<std::int16_t> s = {-2, 300, -32768};
    ck = open(npy_bytes("{'descr': '>i2', 'fortran_order': False, 'shape': (3,), }", raw(s, true)));
    CHECK(ck->tensors()[0].dtype == DType::i16);
    CHECK(read_all(*ck, 0) == std::vector<double>{-2, 300, -32768});
    const std::vector<std::uint16_t> h = {0x3C00, 0xC000};  // binary16 1 and -2 (IEEE 754-2008, from memory)
    ck = open(npy_bytes("{'descr': '>f2', 'fortran_order': False, 'shape': (2,), }", raw(h, true)));
    CHECK(read_all(*ck, 0) == std::vector<double>{1, -2});
  }
  SUBCASE("one-byte types: no byte order, '|' or '<'") {
    auto ck = open(npy_bytes("{'descr': '|i1', 'fortran_order': False, 'shape': (2,), }", "\xff\x05"));
    CHECK(ck->tensors()[0].dtype == DType::i8);
    CHECK_FALSE(ck->tensors()[0].big_endian);
    CHECK(read_all(*ck, 0) == std::vector<double>{-1, 5});
    ck = open(npy_bytes("{'descr': '>u1', 'fortran_order': False, 'shape': (2,), }", "\xff\x05"));
    CHECK(ck->tensors()[0].dtype == DType::u8);
    CHECK_FALSE(ck->tensors()[0].big_endian);
    ck = open(npy_bytes("{'descr': '|b1', 'fortran_order': False, 'shape': (2,), }", std::string("\x01\x00", 2)));
    CHECK(ck->tensors()[0].dtype == DType::boolean);
    CHECK(read_all(*ck, 0) == std::vector<double>{1, 0});
  }
  SUBCASE("native and unmarked byte order are little endian") {
    for (const char* d : {"=f4", "f4"}) {
      const auto ck = open(npy_bytes(fmt::format("{{'descr': '{}', 'fortran_order': False, 'shape': (12,), }}", d), raw(a)));
      CHECK_FALSE(ck->tensors()[0].big_endian);
      CHECK(read_all(*ck, 0) == as_double(a));
    }
  }
  SUBCASE("Fortran order is reported, the bytes are left in storage order") {
    const auto ck = open(npy_bytes("{'descr': '<f4', 'fortran_order': True, 'shape': (3, 4), }", raw(a)));
    CHECK(ck->tensors()[0].fortran_order);
    CHECK(read_all(*ck, 0) == as_double(a));
  }
  SUBCASE("other spellings of the same dict") {
    for (const char* dict : {"{\"shape\": (3, 4), \"descr\": \"<f4\", \"fortran_order\": False}",
                             "{ 'descr' : '<f4' ,\n 'fortran_order' : False ,\t'shape' : ( 3 , 4 , ) , }",
                             "{'descr': '<f4', 'fortran_order': False, 'shape': (3L, 4L), }"}) {
      CAPTURE(dict);
      const auto ck = open(npy_bytes(dict, raw(a)));
      CHECK(ck->tensors()[0].shape == std::vector<std::uint64_t>{3, 4});
      CHECK(read_all(*ck, 0) == as_double(a));
    }
    // Unpadded (the dict ends the header): the data starts right after it.
    const auto ck = open(npy_bytes(f4_34, raw(a), 1, false));
    CHECK(read_all(*ck, 0) == as_double(a));
  }
  SUBCASE("scalars, one element, empty arrays") {
    auto ck = open(npy_bytes("{'descr': '<f8', 'fortran_order': False, 'shape': (), }", raw(std::vector<double>{-7.5})));
    CHECK(ck->tensors()[0].shape.empty());
    CHECK(read_all(*ck, 0) == std::vector<double>{-7.5});
    ck = open(npy_bytes("{'descr': '<u4', 'fortran_order': False, 'shape': (1,), }", raw(std::vector<std::uint32_t>{9})));
    CHECK(read_all(*ck, 0) == std::vector<double>{9});
    ck = open(npy_bytes("{'descr': '<f4', 'fortran_order': False, 'shape': (0, 5), }", ""));
    CHECK(ck->tensors()[0].count() == 0);
  }
}

TEST_CASE("npy: malformed files are refused with the file and the problem") {
  TempDir dir;
  const std::string path = dir.file("bad.npy");
  auto refuse = [&](const std::string& bytes) {
    write_file(path, bytes);
    const std::string m = error_of([&] { (void)open_npy(path); });
    CHECK_MESSAGE(contains(m, path + ": "), m);
    return m;
  };
  const std::string data48 = raw(ramp(12));
  auto dict = [](const std::string& descr, const std::string& shape) {
    return fmt::format("{{'descr': '{}', 'fortran_order': False, 'shape': {}, }}", descr, shape);
  };

  SUBCASE("no magic, or a file that ends in the prefix") {
    CHECK(contains(refuse("PK\x03\x04 not numpy"), "does not start with the .npy magic"));
    CHECK(contains(refuse("\x93NUM"), "does not start with the .npy magic"));
    CHECK(contains(refuse(std::string("\x93NUMPY\x01\x00\x40", 9)), "the file has 9 bytes and ends inside the .npy header"));
  }
  SUBCASE("unknown versions") {
    std::string b = npy_bytes(dict("<f4", "(12,)"), data48);
    b[6] = 4;
    CHECK(contains(refuse(b), ".npy format version 4.0; lobit reads versions 1.0, 2.0 and 3.0"));
    b[6] = 1;
    b[7] = 1;
    CHECK(contains(refuse(b), ".npy format version 1.1"));
  }
  SUBCASE("a header length past the end of the file, or beyond the limit") {
    std::string b = npy_bytes(dict("<f4", "(12,)"), "");
    b[8] = '\xff';
    b[9] = '\x7f';
    CHECK(contains(refuse(b), "the header ends at byte 32777, but the file has 128 bytes"));
    std::string v2 = npy_bytes(dict("<f4", "(12,)"), data48, 2);
    v2[10] = '\x10';  // 1 MiB + the real length
    CHECK(contains(refuse(v2), "more than the 128 KiB lobit accepts"));
  }
  SUBCASE("data shorter or longer than the header says") {
    std::string m = refuse(npy_bytes(dict("<f4", "(3, 4)"), data48.substr(0, 44)));
    CHECK_MESSAGE(contains(m, "the data has 44 bytes but f32 [3, 4] needs 48 (the file is truncated)"), m);
    m = refuse(npy_bytes(dict("<f4", "(3, 4)"), data48 + "tail"));
    CHECK_MESSAGE(contains(m, "4 bytes follow the 48 bytes of f32 [3, 4]"), m);
  }
  SUBCASE("types lobit does not read") {
    std::string m = refuse(npy_bytes(dict("|V2", "(2,)"), "abcd"));
    CHECK_MESSAGE(contains(m, "descr \"|V2\" is raw bytes (a void type)"), m);
    CHECK_MESSAGE(contains(m, "NumPy has no bfloat16 or 8-bit float type"), m);
    m = refuse(npy_bytes(dict("<c8", "(2,)"), std::string(16, '\0')));
    CHECK_MESSAGE(contains(m, "descr \"<c8\" is a complex type"), m);
    m = refuse(npy_bytes(dict("<f16", "(1,)"), std::string(16, '\0')));
    CHECK_MESSAGE(contains(m, "extended precision"), m);
    m = refuse(npy_bytes(dict("<U3", "(1,)"), std::string(12, '\0')));
    CHECK_MESSAGE(contains(m, "is a string type"), m);
    m = refuse(npy_bytes(dict("|O", "(1,)"), std::string(8, '\0')));
    CHECK_MESSAGE(contains(m, "is not a NumPy type string"), m);
    m = refuse(npy_bytes("{'descr': [('x', '<f4'), ('y', '<f4')], 'fortran_order': False, 'shape': (1,), }",
                         std::string(8, '\0')));
    CHECK_MESSAGE(contains(m, "structured (record) array"), m);
    m = refuse(npy_bytes(dict("|f4", "(12,)"), data48));
    CHECK_MESSAGE(contains(m, "has byte order '|' (not applicable), but its elements have several bytes"), m);
  }
  SUBCASE("dicts that are not exactly the three keys") {
    CHECK(contains(refuse(npy_bytes("{'descr': '<f4', 'shape': (12,), }", data48)), "the header has no 'fortran_order'"));
    CHECK(contains(refuse(npy_bytes("{'descr': '<f4', 'fortran_order': False, 'shape': (12,), 'x': 1}", data48)),
                   "the header has the key \"x\""));
    CHECK(contains(refuse(npy_bytes("{'descr': '<f4', 'descr': '<f4', 'fortran_order': False, 'shape': (12,)}", data48)),
                   "the header has 'descr' twice"));
    CHECK(contains(refuse(npy_bytes("{'descr': '<f4', 'fortran_order': 0, 'shape': (12,)}", data48)),
                   "fortran_order is not True or False"));
    CHECK(contains(refuse(npy_bytes("{'descr': '<f4', 'fortran_order': False, 'shape': (12,)} x", data48)),
                   "unexpected text after the header dict"));
    CHECK(contains(refuse(npy_bytes("{'descr' '<f4', 'fortran_order': False, 'shape': (12,)}", data48)),
                   "no ':' after the key \"descr\""));
    CHECK(contains(refuse(npy_bytes("{'descr': '<f4' 'fortran_order': False}", data48)), "expected ',' or '}'"));
    CHECK(contains(refuse(npy_bytes("['descr', '<f4']", data48)), "the header does not start with '{'"));
  }
  SUBCASE("shapes that are not tuples of non-negative integers") {
    CHECK(contains(refuse(npy_bytes(dict("<f4", "(12)"), data48)), "shape is '(N)', an integer"));
    CHECK(contains(refuse(npy_bytes(dict("<f4", "[3, 4]"), data48)), "shape is a list"));
    CHECK(contains(refuse(npy_bytes(dict("<f4", "(-12,)"), data48)), "shape entries must be non-negative integers"));
    CHECK(contains(refuse(npy_bytes(dict("<f4", "(3.0, 4)"), data48)), "expected ',' or ')' in the shape"));
    CHECK(contains(refuse(npy_bytes(dict("<f4", "(99999999999999999999,)"), data48)), "larger than 2^64"));
    CHECK(contains(refuse(npy_bytes(dict("<f4", "(4294967296, 4294967296)"), data48)),
                   "the shape [4294967296, 4294967296] needs more than 2^64 bytes"));
    std::string many = "(1";
    for (int i = 0; i < 64; ++i) many += ", 1";
    CHECK(contains(refuse(npy_bytes(dict("<f4", many + ")"), data48.substr(0, 4))), "more than 64 axes"));
  }
}

TEST_CASE("npy / npz sniffing") {
  const std::string npy = npy_bytes("{'descr': '<f4', 'fortran_order': False, 'shape': (), }", "abcd");
  const auto* p = reinterpret_cast<const unsigned char*>(npy.data());
  CHECK(looks_like_npy(p, npy.size()));
  CHECK_FALSE(looks_like_npy(p, 5));
  CHECK_FALSE(looks_like_npz(p, npy.size()));
  const unsigned char zip[] = {'P', 'K', 3, 4, 20, 0};
  const unsigned char empty_zip[] = {'P', 'K', 5, 6, 0, 0};
  CHECK(looks_like_npz(zip, sizeof zip));
  CHECK(looks_like_npz(empty_zip, sizeof empty_zip));
  CHECK_FALSE(looks_like_npy(zip, sizeof zip));
  // The header parser alone, as the .npz reader uses it.
  const NpyHeader h = parse_npy_header(p, npy.size(), "x");
  CHECK(h.data_offset == 128);  // 10 + 58 + '\n', padded to 64
  CHECK(h.data_bytes == 4);
  CHECK(npy_prefix_bytes(p, 9, "x") == std::nullopt);
  CHECK(npy_prefix_bytes(p, 10, "x") == 128);
}

TEST_CASE("npz: stored, deflated and zip64 archives written by Python's zipfile") {
  for (const char* name : {"stored.npz", "deflated.npz", "zip64.npz", "zip64_deflated.npz", "full_zip64.npz"}) {
    CAPTURE(name);
    const std::string path = fixture(name);
    const bool stored = !contains(name, "deflated");
    const auto ck = open_npz(path);
    CHECK(ck->kind() == "npz");
    CHECK(ck->path() == path);
    REQUIRE(ck->tensors().size() == 4);
    const auto& t = ck->tensors();
    CHECK(t[0].name == "a");
    CHECK(t[1].name == "b");
    CHECK(t[2].name == "s");
    CHECK(t[3].name == "h");
    for (const TensorInfo& x : t) {
      CHECK(x.file == path);
      CHECK(contains(x.origin, stored ? "stored, read in place" : "decompressed on first read"));
    }
    CHECK(t[0].dtype == DType::f32);
    CHECK(t[0].shape == std::vector<std::uint64_t>{3, 4});
    CHECK(read_all(*ck, 0) == as_double(ramp(12)));
    CHECK(t[1].dtype == DType::i16);
    CHECK(t[1].big_endian);
    CHECK(read_all(*ck, 1) == std::vector<double>{-2000, -1000, 0, 1000, 2000});
    CHECK(t[2].dtype == DType::f64);
    CHECK(t[2].shape.empty());
    CHECK(read_all(*ck, 2) == std::vector<double>{std::numbers::pi});
    CHECK(t[3].dtype == DType::f16);
    CHECK(t[3].fortran_order);
    CHECK(read_all(*ck, 3) == std::vector<double>{-1, -0.75, -0.5, -0.25, 0, 0.25});
    // A second read of a decompressed member reuses the scratch copy.
    CHECK(read_all(*ck, 0) == as_double(ramp(12)));
  }
}

TEST_CASE("npz: a 4 MiB member, in place and decompressed, read from two threads at once") {
  auto expected = [](std::uint64_t i) {
    const double x = static_cast<double>((i * 2654435761ull) % 4294967296ull) / 4294967296.0 - 0.5;
    return static_cast<float>(x);
  };
  for (const char* name : {"big_stored.npz", "big_deflated.npz"}) {
    CAPTURE(name);
    const auto ck = open_npz(fixture(name));
    REQUIRE(ck->tensors().size() == 1);
    const std::uint64_t n = ck->tensors()[0].count();
    REQUIRE(n == (1u << 20));
    bool ok[2] = {false, false};
    auto part = [&](int k) {
      std::vector<float> v(1u << 16);
      bool all = true;
      for (std::uint64_t first = k * n / 2; first < (k + 1) * n / 2; first += v.size()) {
        ck->read_f32(0, first, v.size(), v.data());
        for (std::size_t j = 0; j < v.size(); ++j) all = all && v[j] == expected(first + j);
      }
      ok[k] = all;
    };
    std::thread t0(part, 0), t1(part, 1);
    t0.join();
    t1.join();
    CHECK(ok[0]);
    CHECK(ok[1]);
  }
}

TEST_CASE("npz: malformed archives are refused naming the archive and the member") {
  auto open_error = [](const std::string& path) { return error_of([&] { (void)open_npz(path); }); };
  SUBCASE("a member that is not .npy") {
    const std::string m = open_error(fixture("not_npy.npz"));
    CHECK_MESSAGE(contains(m, fixture("not_npy.npz") + ", member \"notes.txt\": is not a .npy array"), m);
  }
  SUBCASE("a .npy member without the magic") {
    const std::string m = open_error(fixture("no_magic.npz"));
    CHECK_MESSAGE(contains(m, "member \"x.npy\": has no .npy magic"), m);
  }
  SUBCASE("a member shorter than its header says") {
    const std::string m = open_error(fixture("short_member.npz"));
    CHECK_MESSAGE(contains(m, "member \"x.npy\": the member holds 36 bytes of data but f32 [10] needs 40"), m);
  }
  SUBCASE("a corrupt deflate stream at the start: found at open") {
    const std::string m = open_error(fixture("corrupt_early.npz"));
    CHECK_MESSAGE(contains(m, "member \"big.npy\": is corrupt: "), m);
  }
  SUBCASE("a corrupt deflate stream later on: found at the first read") {
    const auto ck = open_npz(fixture("corrupt_late.npz"));
    std::vector<float> v(1u << 20);
    const std::string m = error_of([&] { ck->read_f32(0, 0, v.size(), v.data()); });
    CHECK_MESSAGE(contains(m, "member \"big.npy\": is corrupt: "), m);
  }
  SUBCASE("a truncated archive, and a file that is no zip") {
    std::string m = open_error(fixture("truncated.npz"));
    CHECK_MESSAGE(contains(m, fixture("truncated.npz") + ": not a readable zip archive: "), m);
    TempDir dir;
    write_file(dir.file("x.npz"), "plain text, not a zip archive");
    m = open_error(dir.file("x.npz"));
    CHECK_MESSAGE(contains(m, "not a readable zip archive: "), m);
  }
  SUBCASE("an archive without members opens with no tensors") {
    CHECK(open_npz(fixture("empty.npz"))->tensors().empty());
  }
}
