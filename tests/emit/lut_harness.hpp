#pragma once
// Shared by the emit tests: generate headers for many formats, compile them
// with the system compiler into one shared object (a small wrapper per format),
// load it, and compare what the compiled code does with the library, bit for bit.
#include <dlfcn.h>

#include <algorithm>
#include <bit>
#include <cfloat>
#include <cmath>
#include <cstdint>
#include <cstdlib>
#include <filesystem>
#include <fmt/format.h>
#include <fstream>
#include <memory>
#include <random>
#include <string>
#include <vector>

#include "lobit/emit/lut.hpp"
#include "lobit/error.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/format/value_table.hpp"
#include "test_util.hpp"

#include <doctest/doctest.h>
#include <thread>

namespace lobit::test {

struct LutCase {
  std::string spec;
  std::shared_ptr<const ElementFormat> f;
  emit::LutOptions opt;  // language, overflow, decode type, pack order, stem
};

// What the wrapper exports per format (same layout as the C struct it defines).
struct WrapperEntry {
  const char* name;
  std::uint32_t (*decode_bits)(std::uint32_t);
  void (*encode)(const float*, std::size_t, std::uint16_t*);
  void (*encode_count)(const float*, std::size_t, std::uint16_t*);  // may be null
  void (*pack)(const std::uint8_t*, std::size_t, std::uint8_t*);    // may be null
  void (*unpack)(const std::uint8_t*, std::size_t, std::uint8_t*);  // may be null
};

inline std::filesystem::path work_dir(const std::string& sub) {
  std::filesystem::path d = std::filesystem::path(LOBIT_EMIT_TEST_DIR) / sub;
  std::filesystem::remove_all(d);
  std::filesystem::create_directories(d);
  return d;
}

inline void write_text(const std::filesystem::path& p, const std::string& s) {
  std::ofstream o(p, std::ios::binary);
  o << s;
  if (!o) throw std::runtime_error("cannot write " + p.string());
}

// Writes the headers and one wrapper source; `cxx` chooses C++ (cpp and cuda headers) or C.
// `ns` is the namespace the cpp/cuda headers were generated into.
inline std::string wrapper_source(const std::vector<LutCase>& cases, const std::vector<std::string>& headers, bool cxx,
                                  const std::string& ns) {
  std::string s;
  for (const auto& h : headers) s += "#include \"" + h + "\"\n";
  if (cxx) s += "#include <cstddef>\n#include <cstdint>\n";
  s += "typedef struct { const char* name; uint32_t (*decode_bits)(uint32_t); void (*encode)(const float*, size_t, uint16_t*);"
       " void (*encode_count)(const float*, size_t, uint16_t*); void (*pack)(const uint8_t*, size_t, uint8_t*);"
       " void (*unpack)(const uint8_t*, size_t, uint8_t*); } lobit_test_entry;\n";
  const std::string q = cxx ? ns + "::" : "";
  for (std::size_t k = 0; k < cases.size(); ++k) {
    const auto& c = cases[k];
    const std::string P = q + "lobit_" + c.opt.stem;
    const std::string dt(emit::to_string(c.opt.decode_type));
    s += fmt::format("static uint32_t dec_{}(uint32_t c) {{ return {}_decode_{}_bits_of(c); }}\n", k, P, dt);
    s += fmt::format("static void enc_{}(const float* x, size_t n, uint16_t* o) {{ size_t i; for (i = 0; i < n; ++i) o[i] = {}_encode(x[i]); }}\n",
                     k, P);
    const emit::LutEncodePlan plan = emit::plan_encode(*c.f, c.opt.overflow);
    if (plan.thresholds.size() <= 64)
      s += fmt::format("static void cnt_{}(const float* x, size_t n, uint16_t* o) {{ size_t i; for (i = 0; i < n; ++i) o[i] = {}_encode_by_count(x[i]); }}\n",
                       k, P);
    const int b = c.f->bits();
    if (b == 2 || b == 4 || b == 6) {
      s += fmt::format("static void pk_{}(const uint8_t* c, size_t n, uint8_t* o) {{ {}_pack(c, n, o); }}\n", k, P);
      s += fmt::format("static void up_{}(const uint8_t* c, size_t n, uint8_t* o) {{ {}_unpack(c, n, o); }}\n", k, P);
    }
  }
  s += std::string(cxx ? "extern \"C\" " : "") + "const size_t lobit_test_entry_count = " + std::to_string(cases.size()) + ";\n";
  s += std::string(cxx ? "extern \"C\" " : "") + "const lobit_test_entry lobit_test_entries[] = {\n";
  for (std::size_t k = 0; k < cases.size(); ++k) {
    const auto& c = cases[k];
    const emit::LutEncodePlan plan = emit::plan_encode(*c.f, c.opt.overflow);
    const int b = c.f->bits();
    const bool pk = b == 2 || b == 4 || b == 6;
    s += fmt::format("  {{\"{}\", dec_{}, enc_{}, {}, {}, {}}},\n", c.opt.stem, k, k,
                     plan.thresholds.size() <= 64 ? fmt::format("cnt_{}", k) : "0", pk ? fmt::format("pk_{}", k) : "0",
                     pk ? fmt::format("up_{}", k) : "0");
  }
  s += "};\n";
  return s;
}

// Compiles `src` into a shared object and loads it. Flags: no fast-math, no contraction, warnings as errors.
struct Loaded {
  void* handle = nullptr;
  const WrapperEntry* entries = nullptr;
  std::size_t count = 0;
};

inline Loaded compile_and_load(const std::string& compiler, const std::string& std_flag, const std::filesystem::path& src,
                               const std::filesystem::path& so, std::string& log) {
  const std::string cmd = fmt::format(
      "\"{}\" {} -O2 -ffp-contract=off -fno-fast-math -Wall -Wextra -Werror -pedantic -shared -fPIC -o \"{}\" \"{}\" > \"{}.log\" 2>&1",
      compiler, std_flag, so.string(), src.string(), so.string());
  const int rc = std::system(cmd.c_str());
  std::ifstream lf(so.string() + ".log");
  log.assign(std::istreambuf_iterator<char>(lf), {});
  Loaded l;
  if (rc != 0) {
    log = "command: " + cmd + "\n" + log;
    return l;
  }
  l.handle = dlopen(so.c_str(), RTLD_NOW | RTLD_LOCAL);
  if (!l.handle) {
    log = std::string("dlopen: ") + dlerror();
    return l;
  }
  l.entries = static_cast<const WrapperEntry*>(dlsym(l.handle, "lobit_test_entries"));
  auto* cnt = static_cast<const std::size_t*>(dlsym(l.handle, "lobit_test_entry_count"));
  l.count = cnt ? *cnt : 0;
  return l;
}

// Inputs for the encoder: every boundary (each threshold's float32 decision point and its
// neighbours, each threshold rounded to float32 and its neighbours, each value and its
// neighbours, +-max, +-0, subnormals, +-FLT_MAX, +-inf, NaNs) and `random_count` random float32
// (a third uniform bit patterns, a third uniform over +-1.25 max, a third log-uniform magnitudes).
inline std::vector<float> encode_inputs(const ElementFormat& f, Overflow o, std::size_t random_count, std::uint64_t seed) {
  std::vector<float> in;
  auto near = [&](float x, int ulps) {
    if (std::isnan(x)) return;
    float lo = x, hi = x;
    in.push_back(x);
    for (int i = 0; i < ulps; ++i) {
      lo = std::nextafter(lo, -INFINITY);
      hi = std::nextafter(hi, INFINITY);
      in.push_back(lo);
      in.push_back(hi);
    }
  };
  const auto plan = emit::plan_encode(f, o);
  for (const auto& t : plan.thresholds) {
    near(std::bit_cast<float>(t.up_from_bits), 2);
    near(static_cast<float>(t.exact.nearest), 1);
    near(static_cast<float>(t.below), 1);
    near(static_cast<float>(t.above), 1);
  }
  const ValueTable vt(f);
  for (double v : vt.values()) near(static_cast<float>(v), 1), near(-static_cast<float>(v), 1);
  for (float v : {0.0f, -0.0f, FLT_MAX, -FLT_MAX, FLT_MIN, -FLT_MIN, 0x1p-149f, -0x1p-149f, 0x1p-140f, -0x1.8p-130f,
                  INFINITY, -INFINITY})
    near(v, 1);
  for (std::uint32_t nb : {0x7fc00000u, 0xffc00000u, 0x7f800001u, 0xffffffffu, 0x7fbfffffu})
    in.push_back(std::bit_cast<float>(nb));
  std::mt19937_64 rng(seed);
  const double top = std::min<double>(std::max(std::fabs(vt.values().back()), std::fabs(vt.values().front())), FLT_MAX);
  double small = INFINITY;
  for (double v : vt.values())
    if (v != 0) small = std::min(small, std::fabs(v));
  const double lmin = std::log2(std::max(small / 8, 0x1p-150)), lmax = std::log2(std::min(top * 4, 0x1p127));
  std::uniform_real_distribution<double> uni(-1.25, 1.25), lu(lmin, lmax);
  for (std::size_t i = 0; i < random_count; ++i) {
    const std::uint64_t r = rng();
    switch (i % 3) {
      case 0: in.push_back(std::bit_cast<float>(static_cast<std::uint32_t>(r >> 32))); break;
      case 1: in.push_back(static_cast<float>(uni(rng) * top)); break;
      default: {
        const float m = static_cast<float>(std::exp2(lu(rng)));
        in.push_back((r & 1) ? -m : m);
      }
    }
  }
  return in;
}

// The library's code for a float32 input; NaN for a format without a NaN code: the documented
// fallback of the generated encoder (the code of +0.0), since the library refuses NaN there.
inline Code library_code(const ElementFormat& f, float x, Overflow o) {
  if (std::isnan(x) && !f.nan_code()) return f.encode(0.0, Rounding::nearest_even, o);
  return f.encode(static_cast<double>(x), Rounding::nearest_even, o);
}

// Reference bit-stream packer, written from the layout stated in the generated comment:
// code i holds stream bits b*i .. b*i+b-1 (code bit 0 first for lo-first, code bit b-1 first for
// hi-first), stream bit s is bit s%8 (lo-first) or 7 - s%8 (hi-first) of byte s/8.
inline std::vector<std::uint8_t> reference_pack(const std::vector<std::uint8_t>& codes, int b, bool lo_first) {
  std::vector<std::uint8_t> out((codes.size() * b + 7) / 8, 0);
  for (std::size_t i = 0; i < codes.size(); ++i)
    for (int j = 0; j < b; ++j) {
      const std::size_t s = i * b + j;
      const int code_bit = lo_first ? j : b - 1 - j;
      const int bit = (codes[i] >> code_bit) & 1;
      const int byte_bit = lo_first ? static_cast<int>(s % 8) : 7 - static_cast<int>(s % 8);
      out[s / 8] |= static_cast<std::uint8_t>(bit << byte_bit);
    }
  return out;
}

// Decoded value of a generated decode-table entry, by the library's definition of the type.
inline double decode_entry(emit::DecodeType t, std::uint32_t bits) {
  static const auto f16 = parse_element("fp16"), bf16 = parse_element("bf16");
  switch (t) {
    case emit::DecodeType::f32: return static_cast<double>(std::bit_cast<float>(bits));
    case emit::DecodeType::f16: return f16->decode(bits & 0xffff);
    case emit::DecodeType::bf16: return bf16->decode(bits & 0xffff);
    case emit::DecodeType::scaled_int: break;  // not a bit pattern (lut_scaled_int_test checks it)
  }
  return NAN;
}

struct Tally {
  std::size_t decode_checked = 0, encode_checked = 0, pack_checked = 0;
};

inline void check_case(const LutCase& c, const WrapperEntry& e, Tally& tally, std::size_t random_inputs) {
  const ElementFormat& f = *c.f;
  INFO("format ", c.spec, " (", e.name, "), overflow ", to_string(c.opt.overflow), ", decode ",
       emit::to_string(c.opt.decode_type));
  // Decode: every code.
  const Code n = Code{1} << f.bits();
  std::size_t bad_decode = 0;
  std::string first_bad;
  for (Code code = 0; code < n; ++code) {
    const double got = decode_entry(c.opt.decode_type, e.decode_bits(static_cast<std::uint32_t>(code)));
    const CodeClass k = f.classify(code);
    double want = f.decode(code);
    if (k == CodeClass::unused) want = NAN;
    if (c.opt.allow_inexact && std::isfinite(want) && c.opt.decode_type == emit::DecodeType::f32)
      want = static_cast<double>(static_cast<float>(want));  // C++ conversion: nearest-even (IEEE 754 section 5.4.2)
    if (!same_value(got, want)) {
      if (!bad_decode++) first_bad = fmt::format("code {:#x}: generated {} library {}", code, got, want);
    }
  }
  CHECK_MESSAGE(bad_decode == 0, first_bad);
  tally.decode_checked += n;

  // Encode.
  const auto in = encode_inputs(f, c.opt.overflow, random_inputs, 0x5eed0000u + f.bits());
  std::vector<std::uint16_t> got(in.size()), cnt(in.size());
  e.encode(in.data(), in.size(), got.data());
  if (e.encode_count) e.encode_count(in.data(), in.size(), cnt.data());
  std::vector<std::uint16_t> want(in.size());
  {
    // The library's answers, on two threads.
    auto work = [&](std::size_t lo, std::size_t hi) {
      for (std::size_t i = lo; i < hi; ++i) want[i] = static_cast<std::uint16_t>(library_code(f, in[i], c.opt.overflow));
    };
    std::thread t(work, 0, in.size() / 2);
    work(in.size() / 2, in.size());
    t.join();
  }
  std::size_t bad = 0, bad_cnt = 0;
  std::string first;
  for (std::size_t i = 0; i < in.size(); ++i) {
    if (got[i] != want[i] && !bad++)
      first = fmt::format("input {:a} (bits {:#010x}): generated {:#x}, library {:#x}", static_cast<double>(in[i]),
                          std::bit_cast<std::uint32_t>(in[i]), got[i], want[i]);
    if (e.encode_count && cnt[i] != want[i] && !bad_cnt++)
      first += fmt::format("; by_count: input {:a}: generated {:#x}, library {:#x}", static_cast<double>(in[i]), cnt[i],
                           want[i]);
  }
  CHECK_MESSAGE(bad == 0, bad, " mismatches; first ", first);
  CHECK_MESSAGE(bad_cnt == 0, bad_cnt, " by-count mismatches; ", first);
  tally.encode_checked += in.size();

  // Pack / unpack.
  if (e.pack) {
    const int b = f.bits();
    std::mt19937_64 rng(77 + b);
    for (std::size_t len : {1u, 3u, 5u, 7u, 9u, 13u, 31u, 101u, 1001u, 4097u}) {
      std::vector<std::uint8_t> codes(len);
      for (auto& x : codes) x = static_cast<std::uint8_t>(rng() & ((1u << b) - 1));
      const auto ref = reference_pack(codes, b, c.opt.pack == emit::PackOrder::lo_first);
      // Exact-size buffers with a guard byte after each, to catch a write or a read past the end.
      std::vector<std::uint8_t> packed(ref.size() + 1, 0xa5), back(len + 1, 0x5a);
      e.pack(codes.data(), len, packed.data());
      CHECK_MESSAGE(std::equal(ref.begin(), ref.end(), packed.begin()), "pack layout, length ", len);
      CHECK_MESSAGE(packed.back() == 0xa5, "pack wrote past the end, length ", len);
      e.unpack(packed.data(), len, back.data());
      CHECK_MESSAGE(std::equal(codes.begin(), codes.end(), back.begin()), "round trip, length ", len);
      CHECK_MESSAGE(back.back() == 0x5a, "unpack wrote past the end, length ", len);
      tally.pack_checked += len;
    }
  }
}

// The formats the generated-code tests sweep: every element preset of up to 16
// bits; minifloats of exp 1..5 x man 0..3, both signs, subnormals on/off, the
// special layouts in turn; ranges at the edges of float32 (values below its
// subnormals, above its max); integers, fixed point, power-of-two formats; and
// codebooks without a zero (a tie at 0), with values float32 cannot hold, or
// beyond float32.
inline std::vector<std::string> element_sweep_specs() {
  std::vector<std::string> s;
  for (const auto& p : presets()) {
    if (p.scaled()) continue;
    if (parse_element(p.name)->bits() > 16) continue;
    s.push_back(p.name);
  }
  const char* specials[] = {"ieee", "top-nan", "negzero-nan", "none"};
  int k = 0;
  for (int e = 1; e <= 5; ++e)
    for (int m = 0; m <= 3; ++m)
      for (int sign = 0; sign < 2; ++sign)
        for (int sub = 0; sub < 2; ++sub) {
          const std::string sp = fmt::format("float+exp={}+man={}+sign={}+subnormals={}+special={}", e, m,
                                             sign ? "yes" : "no", sub ? "yes" : "no", specials[(k++) % 4]);
          try {
            parse_element(sp);
            s.push_back(sp);
          } catch (const Error&) {
            // impossible combination (e.g. no finite value left): the parser's business
          }
        }
  for (const char* sp : {"float+exp=5+man=2+bias=160+special=ieee", "float+exp=5+man=3+bias=-120+special=none",
                         "float+exp=6+man=5+special=ieee", "float+exp=4+man=8+special=top-nan", "bf16+subnormals=no",
                         "float+exp=8+man=7+bias=100+special=ieee", "float+exp=3+man=0+special=none"})
    s.push_back(sp);
  for (int b : {2, 3, 5, 6, 9, 12})
    for (const char* var : {"", "+range=symmetric", "+signed=no"}) s.push_back(fmt::format("int+bits={}{}", b, var));
  for (const char* sp : {"int+bits=8+frac=5", "int+bits=6+frac=20+signed=no"}) s.push_back(sp);
  for (const char* sp : {"pow2+exp=3+bias=3", "pow2+exp=4+bias=7+zero=no", "pow2+exp=5+bias=15+sign=no+nan=yes"})
    s.push_back(sp);
  for (const char* sp : {"codebook+values=-1/1", "codebook+values=-3/-1/1/3", "codebook+values=-0.3/0.1/0.7",
                         "codebook+values=-1e300/-1e-300/0/1e-300/1e300", "codebook+values=1/2/3", "codebook+values=-5/-2",
                         "codebook+values=0/1.000000059604644775390625/1.000000178813934326171875/2",
                         "normal-quantile+bits=3"})
    s.push_back(sp);
  return s;
}

}  // namespace lobit::test
