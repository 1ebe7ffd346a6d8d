// Block-scaled output (`lobit lut ELEMENT@K:SCALE`): the block struct, the scale decode
// and the dequantize-block function, compiled (C99 and C++17) and compared bit for bit with
// lobit::quantize_tensor and with the definition value = float32(scale * element).
#include <doctest/doctest.h>

#include <cstring>

#include "lobit/error.hpp"
#include "lobit/scale/quantize.hpp"
#include "lobit/scale/scaled_format.hpp"
#include "lut_harness.hpp"

using namespace lobit;
using namespace lobit::test;

namespace {

const char* const block_specs[] = {"mxfp4",         "mxfp6-e3m2",   "mxfp6-e2m3",    "mxfp8-e4m3", "mxfp8-e5m2",
                                   "mxint8",        "e2m1@16:e4m3", "int4@32:fp16",  "uint2@8:bf16", "e3m2@32:e8m0",
                                   "int6@4:uint8"};

struct BlockEntry {
  const char* name;
  std::uint32_t (*scale_bits)(std::uint32_t);
  void (*dequantize)(const std::uint8_t*, float*);
  std::size_t (*block_bytes)(void);
};

struct BlockCase {
  std::string spec;
  std::shared_ptr<const ScaledFormat> sf;
  emit::LutOptions opt;
};

std::vector<BlockCase> block_cases(emit::LutLanguage lang) {
  const bool cxx = lang != emit::LutLanguage::c;
  std::vector<BlockCase> v;
  int i = 0;
  for (const char* sp : block_specs) {
    BlockCase c;
    c.spec = sp;
    c.sf = parse_scaled(sp);
    c.opt.language = lang;
    c.opt.cpp_namespace = "lobit_block_test";
    c.opt.stem = emit::lut_identifier_stem(fmt::format("b{}_{}", i, sp));
    c.opt.title = sp;
    c.opt.command = std::string("lut_block_test ") + sp;
    c.opt.pack = ((i + (cxx ? 1 : 0)) % 2) ? emit::PackOrder::hi_first : emit::PackOrder::lo_first;
    ++i;
    v.push_back(std::move(c));
  }
  return v;
}

std::string block_wrapper(const std::vector<BlockCase>& cases, const std::vector<std::string>& headers, bool cxx) {
  std::string s;
  for (const auto& h : headers) s += "#include \"" + h + "\"\n";
  s += "typedef struct { const char* name; uint32_t (*scale_bits)(uint32_t); void (*dequantize)(const uint8_t*, float*);"
       " size_t (*block_bytes)(void); } lobit_block_entry;\n";
  const std::string q = cxx ? "lobit_block_test::" : "";
  for (std::size_t k = 0; k < cases.size(); ++k) {
    const std::string P = q + "lobit_" + cases[k].opt.stem;
    s += fmt::format("static uint32_t sb_{}(uint32_t c) {{ return {}_scale_decode_f32_bits_of(c); }}\n", k, P);
    s += fmt::format("static void dq_{}(const uint8_t* bytes, float* out) {{ {}_block b; memcpy(&b, bytes, sizeof b); {}_dequantize_block(&b, out); }}\n",
                     k, P, P);
    s += fmt::format("static size_t bb_{}(void) {{ return sizeof({}_block); }}\n", k, P);
  }
  s += std::string(cxx ? "extern \"C\" " : "") + "const size_t lobit_block_entry_count = " + std::to_string(cases.size()) + ";\n";
  s += std::string(cxx ? "extern \"C\" " : "") + "const lobit_block_entry lobit_block_entries[] = {\n";
  for (std::size_t k = 0; k < cases.size(); ++k)
    s += fmt::format("  {{\"{}\", sb_{}, dq_{}, bb_{}}},\n", cases[k].opt.stem, k, k, k);
  return s + "};\n";
}

// The block's bytes as the generated comment documents them: scale code little-endian, then the
// element codes (one per byte for 8 bits, else packed like the element's pack function).
std::vector<std::uint8_t> block_bytes(const BlockCase& c, Code scale_code, const std::vector<std::uint8_t>& codes) {
  const int sb = (c.sf->scale->bits() + 7) / 8;
  std::vector<std::uint8_t> out;
  for (int q = 0; q < sb; ++q) out.push_back(static_cast<std::uint8_t>(scale_code >> (8 * q)));
  if (c.sf->element->bits() == 8) out.insert(out.end(), codes.begin(), codes.end());
  else {
    const auto p = reference_pack(codes, c.sf->element->bits(), c.opt.pack == emit::PackOrder::lo_first);
    out.insert(out.end(), p.begin(), p.end());
  }
  return out;
}

bool same_f32(float a, float b) {
  if (std::isnan(a) || std::isnan(b)) return std::isnan(a) && std::isnan(b);
  return std::bit_cast<std::uint32_t>(a) == std::bit_cast<std::uint32_t>(b);
}

void check_block_case(const BlockCase& c, const BlockEntry& e) {
  INFO("format ", c.spec, " (", e.name, ")");
  const ScaledFormat& sf = *c.sf;
  const int k = sf.block;
  const std::size_t sb = (sf.scale->bits() + 7) / 8, cb = sf.element->bits() == 8 ? k : (k * sf.element->bits() + 7) / 8;
  CHECK(e.block_bytes() == sb + cb);
  // 1. quantize_tensor on data over many binades, zeros, NaN and infinity groups.
  const std::uint64_t rows = 6, blocks = 24, cols = blocks * k;
  std::vector<float> data(rows * cols);
  std::mt19937_64 rng(1234 + k);
  std::normal_distribution<double> g(0, 1);
  const int exps[] = {-149, -135, -126, -100, -20, -3, 0, 7, 15, 60, 100, 120, 126, 127};
  for (std::uint64_t r = 0; r < rows; ++r)
    for (std::uint64_t b = 0; b < blocks; ++b) {
      const std::uint64_t gi = r * blocks + b;
      const int ex = exps[gi % std::size(exps)];
      for (int i = 0; i < k; ++i) {
        float x = static_cast<float>(std::ldexp(g(rng), ex));
        if (gi % 17 == 5) x = 0;                            // an all-zero group
        if (gi % 23 == 7 && i == 1) x = NAN;                // a NaN group
        if (gi % 29 == 11 && i == 0) x = -INFINITY;         // an infinity group
        if (gi % 13 == 3 && i == k - 1) x *= 1e6f;          // an outlier
        data[r * cols + b * k + i] = x;
      }
    }
  const QuantizedTensor qt = quantize_tensor(sf, data, rows, cols, 1);
  REQUIRE(qt.scale_codes.size() == rows * blocks);
  std::size_t bad = 0, skipped_nan_groups = 0;
  std::string first;
  for (std::uint64_t r = 0; r < rows; ++r)
    for (std::uint64_t b = 0; b < blocks; ++b) {
      const std::uint64_t gi = r * blocks + b, base = r * cols + b * k;
      std::vector<std::uint8_t> codes(k);
      for (int i = 0; i < k; ++i) codes[i] = static_cast<std::uint8_t>(qt.codes[base + i]);
      bool nonfinite = false;
      for (int i = 0; i < k; ++i) nonfinite |= !std::isfinite(data[base + i]);
      if (nonfinite && !sf.scale->nan_code()) {
        // The library decodes such a group to NaN, but a scale format without a NaN code cannot store
        // that: the block's bytes hold an ordinary scale code. Documented in the generated comment.
        ++skipped_nan_groups;
        continue;
      }
      const auto bytes = block_bytes(c, qt.scale_codes[gi], codes);
      std::vector<float> out(k);
      e.dequantize(bytes.data(), out.data());
      for (int i = 0; i < k; ++i) {
        const float want = static_cast<float>(qt.values[base + i]);  // the library's binary64 value, rounded once
        if (!same_f32(out[i], want) && !bad++)
          first = fmt::format("group {} element {}: scale code {:#x}, code {:#x}: generated {:a}, library {:a}", gi, i,
                              qt.scale_codes[gi], codes[i], static_cast<double>(out[i]), qt.values[base + i]);
      }
    }
  CHECK_MESSAGE(bad == 0, bad, " mismatches against quantize_tensor; first ", first);
  CHECK(qt.nan_groups > 0);  // the NaN and infinity groups were exercised
  if (!sf.scale->nan_code()) CHECK(skipped_nan_groups == qt.nan_groups);

  // 2. Every scale code (8-bit scales; a spread of 4096 codes for 16-bit ones) with random element codes,
  //    against the definition in lobit/scale/quantize.hpp: value = scale * decode(code), binary64.
  const Code nsc = Code{1} << sf.scale->bits();
  const Code step = nsc <= 256 ? 1 : nsc / 4096;
  bad = 0;
  for (Code sc = 0; sc < nsc; sc = (sc + step < nsc || sc == nsc - 1) ? sc + step : nsc - 1) {
    std::vector<std::uint8_t> codes(k);
    for (auto& x : codes) x = static_cast<std::uint8_t>(rng() & ((1u << sf.element->bits()) - 1));
    const auto bytes = block_bytes(c, sc, codes);
    std::vector<float> out(k);
    e.dequantize(bytes.data(), out.data());
    const double s = sf.scale->decode(sc);
    for (int i = 0; i < k; ++i) {
      const double v = sf.element->decode(codes[i]);
      const float want = static_cast<float>(s * v);
      if (!same_f32(out[i], want) && !bad++)
        first = fmt::format("scale code {:#x} element code {:#x}: generated {:a}, wanted {:a}", sc, codes[i],
                            static_cast<double>(out[i]), s * v);
    }
    if (sc == nsc - 1) break;
  }
  CHECK_MESSAGE(bad == 0, bad, " mismatches against scale * element; first ", first);
}

void run_blocks(emit::LutLanguage lang) {
  const bool cxx = lang != emit::LutLanguage::c;
  const auto cases = block_cases(lang);
  const auto dir = work_dir(fmt::format("block_{}", emit::to_string(lang)));
  std::vector<std::string> headers;
  for (const auto& c : cases) {
    const std::string h = (dir / (c.opt.stem + (cxx ? ".hpp" : ".h"))).string();
    const std::string text = emit::emit_block_lut(*c.sf, c.opt);
    REQUIRE(text == emit::emit_block_lut(*c.sf, c.opt));
    write_text(h, text);
    headers.push_back(h);
  }
  const auto src = dir / (cxx ? "wrapper.cpp" : "wrapper.c");
  std::string w = block_wrapper(cases, headers, cxx);
  if (cxx) w = "#include <cstring>\n#include <cstddef>\n#include <cstdint>\n" + w;
  write_text(src, w);
  const auto so = dir / "wrapper.so";
  const std::string cmd = fmt::format(
      "\"{}\" {} -O2 -ffp-contract=off -fno-fast-math -Wall -Wextra -Werror -pedantic -shared -fPIC -o \"{}\" \"{}\" > \"{}.log\" 2>&1",
      cxx ? LOBIT_TEST_CXX_COMPILER : LOBIT_TEST_C_COMPILER, cxx ? "-std=c++17" : "-std=c99", so.string(), src.string(),
      so.string());
  const int rc = std::system(cmd.c_str());
  std::ifstream lf(so.string() + ".log");
  const std::string log((std::istreambuf_iterator<char>(lf)), {});
  REQUIRE_MESSAGE(rc == 0, cmd, "\n", log.substr(0, 4000));
  void* h = dlopen(so.c_str(), RTLD_NOW | RTLD_LOCAL);
  REQUIRE_MESSAGE(h != nullptr, dlerror());
  auto* entries = static_cast<const BlockEntry*>(dlsym(h, "lobit_block_entries"));
  auto* count = static_cast<const std::size_t*>(dlsym(h, "lobit_block_entry_count"));
  REQUIRE(entries != nullptr);
  REQUIRE(count != nullptr);
  REQUIRE(*count == cases.size());
  for (std::size_t k = 0; k < cases.size(); ++k) {
    REQUIRE(std::string(entries[k].name) == cases[k].opt.stem);
    check_block_case(cases[k], entries[k]);
  }
  // E8M0 edge cases, OCP Microscaling Formats v1.0, section 5.4.1 (from memory): bias 127, code 0x00 is
  // 2^-127 (a float32 subnormal, bit pattern 0x00400000 by IEEE 754 binary32 encoding), 0xFF is NaN, 0xFE is 2^127.
  const BlockEntry& mx = entries[0];  // mxfp4 = e2m1@32:e8m0
  CHECK(mx.scale_bits(0x00) == 0x00400000u);
  CHECK(mx.scale_bits(0x7f) == 0x3f800000u);  // 2^0 = 1.0
  CHECK(mx.scale_bits(0xfe) == 0x7f000000u);  // 2^127
  CHECK(std::isnan(std::bit_cast<float>(mx.scale_bits(0xff))));
  {
    // Scale 2^127 times the E2M1 maximum 6 overflows float32 (max ~2^128): +inf; 2^-127 times 0.5 is 2^-128, a
    // float32 subnormal (0x00200000); a NaN scale makes every element NaN (OCP MX v1.0, section 5.2, from memory).
    std::vector<std::uint8_t> codes(32, 0x7);  // e2m1 0x7 = 6.0
    codes[1] = 0x1;                             // 0.5
    codes[2] = 0x8;                             // -0
    float out[32];
    auto bytes = block_bytes(cases[0], 0xfe, codes);
    mx.dequantize(bytes.data(), out);
    CHECK(std::isinf(out[0]));
    CHECK(out[1] == 0x1p126f);
    bytes = block_bytes(cases[0], 0x00, codes);
    mx.dequantize(bytes.data(), out);
    CHECK(std::bit_cast<std::uint32_t>(out[1]) == 0x00200000u);
    CHECK(std::bit_cast<std::uint32_t>(out[2]) == 0x80000000u);  // -0 stays -0
    bytes = block_bytes(cases[0], 0xff, codes);
    mx.dequantize(bytes.data(), out);
    for (float v : out) CHECK(std::isnan(v));
  }
  dlclose(h);
}

}  // namespace

TEST_CASE("generated block layouts (C99) match quantize_tensor") { run_blocks(emit::LutLanguage::c); }
TEST_CASE("generated block layouts (C++17) match quantize_tensor") { run_blocks(emit::LutLanguage::cpp); }
TEST_CASE("generated block layouts (CUDA header as host C++) match quantize_tensor") { run_blocks(emit::LutLanguage::cuda); }

TEST_CASE("block layouts refuse what they cannot express") {
  emit::LutOptions o;
  CHECK_THROWS_AS(emit::emit_block_lut(*parse_scaled("e2m1@16:e4m3,tensor-scale=fp32"), o), Error);
  CHECK_THROWS_AS(emit::emit_block_lut(*parse_scaled("uint4@128:fp16,zero=uint4"), o), Error);
  CHECK_THROWS_AS(emit::emit_block_lut(*parse_scaled("e2m1@32:fp32"), o), Error);  // 32-bit scale
  CHECK_THROWS_AS(emit::emit_block_lut(*parse_scaled("int3@32:e8m0"), o), Error);  // 3-bit elements
  o.language = emit::LutLanguage::json;
  CHECK_THROWS_AS(emit::emit_block_lut(*parse_scaled("mxfp4"), o), Error);
}
