// `lobit lut --lang cuda`: the header compiles with nvcc (device code, warnings as
// errors) where nvcc exists, and the same functions compiled as host C++ (by the
// system C++ compiler, and by nvcc where it exists) match the library bit for bit.
#include <doctest/doctest.h>

#include "lobit/scale/scaled_format.hpp"
#include "lut_harness.hpp"

using namespace lobit;
using namespace lobit::test;

namespace {

// Small formats (constant memory), a 6- and a 2-bit one for packing, and fp16 (its
// tables exceed 64 KiB of constant memory and go to global memory).
const char* const cuda_specs[] = {"e2m1", "e2m3", "e3m2", "e4m3", "e5m2", "int4", "uint2", "int6", "nf4", "e8m0", "fp16"};

std::vector<LutCase> cuda_cases() {
  std::vector<LutCase> cases;
  int i = 0;
  for (const char* sp : cuda_specs) {
    LutCase c;
    c.spec = sp;
    c.f = parse_element(sp);
    c.opt.language = emit::LutLanguage::cuda;
    c.opt.cpp_namespace = "lobit_cuda_test";
    c.opt.stem = emit::lut_identifier_stem(fmt::format("cu{}_{}", i, sp));
    c.opt.title = sp;
    c.opt.command = std::string("lut_cuda_test ") + sp;
    c.opt.pack = (i % 2) ? emit::PackOrder::hi_first : emit::PackOrder::lo_first;
    c.opt.overflow = (i % 3 == 0) ? Overflow::special : Overflow::format_default;
    c.opt.stochastic = (i % 2) == 0;  // device compile of the stochastic encoder (host side: lut_stochastic_test)
    ++i;
    cases.push_back(std::move(c));
  }
  return cases;
}

std::vector<std::string> write_headers(const std::vector<LutCase>& cases, const std::filesystem::path& dir) {
  std::vector<std::string> headers;
  for (const auto& c : cases) {
    const std::string h = (dir / (c.opt.stem + ".cuh")).string();
    write_text(h, emit::emit_lut(*c.f, c.opt));
    headers.push_back(h);
  }
  return headers;
}

void check_all(const std::vector<LutCase>& cases, const Loaded& l) {
  REQUIRE(l.count == cases.size());
  Tally tally;
  for (std::size_t k = 0; k < cases.size(); ++k) {
    REQUIRE(std::string(l.entries[k].name) == cases[k].opt.stem);
    check_case(cases[k], l.entries[k], tally, std::size_t{1} << 20);
  }
  MESSAGE(fmt::format("{} formats: {} codes decoded, {} inputs encoded, {} codes packed", cases.size(), tally.decode_checked,
                      tally.encode_checked, tally.pack_checked));
}

}  // namespace

TEST_CASE("cuda header as host C++ matches the library") {
  const auto cases = cuda_cases();
  const auto dir = work_dir("cuda_host");
  const auto headers = write_headers(cases, dir);
  const auto src = dir / "wrapper.cpp";
  write_text(src, wrapper_source(cases, headers, true, "lobit_cuda_test"));
  std::string log;
  const Loaded l = compile_and_load(LOBIT_TEST_CXX_COMPILER, "-std=c++17", src, dir / "wrapper.so", log);
  REQUIRE_MESSAGE(l.entries != nullptr, "compiling the generated code failed:\n", log.substr(0, 4000));
  check_all(cases, l);
  dlclose(l.handle);
}

TEST_CASE("cuda header compiles with nvcc, and its host side matches the library") {
  const std::string nvcc = LOBIT_TEST_NVCC;
  if (nvcc.empty() || nvcc.find("NOTFOUND") != std::string::npos) {
    MESSAGE("nvcc not found: the CUDA compile check is skipped (configure with nvcc on PATH or in /usr/local/cuda/bin)");
    return;
  }
  const auto cases = cuda_cases();
  const auto dir = work_dir("cuda_nvcc");
  const auto headers = write_headers(cases, dir);
  // Device code: a kernel that calls every generated function.
  std::string cu;
  for (const auto& h : headers) cu += "#include \"" + h + "\"\n";
  cu += "__global__ void lobit_test_kernel(const float* x, unsigned n, unsigned short* codes, float* back, unsigned char* packed) {\n"
        "  const unsigned i = blockIdx.x * blockDim.x + threadIdx.x;\n  if (i >= n) return;\n";
  for (const auto& c : cases) {
    const std::string P = "lobit_cuda_test::lobit_" + c.opt.stem;
    cu += fmt::format("  codes[i] = {}_encode(x[i]);\n", P);
    if (emit::plan_encode(*c.f, c.opt.overflow).thresholds.size() <= 64) cu += fmt::format("  codes[i] ^= {}_encode_by_count(x[i]);\n", P);
    if (c.opt.stochastic) cu += fmt::format("  codes[i] ^= {}_encode_stochastic(x[i], i * 2654435761u);\n", P);
    cu += fmt::format("  back[i] = {}_decode_f32(codes[i]);\n", P);
    const int b = c.f->bits();
    if (b == 2 || b == 4 || b == 6)
      cu += fmt::format("  if (i == 0) {{ unsigned char t[8] = {{1, 2, 3, 0, 1, 2, 3, 1}}, u[8]; {}_pack(t, 7, packed); {}_unpack(packed, 7, u); packed[7] = u[6]; }}\n", P, P);
  }
  cu += "}\n";
  // Block layouts and a product table, device side.
  for (const char* sp : {"mxfp4", "int4@32:fp16", "mxfp8-e4m3"}) {
    emit::LutOptions o;
    o.language = emit::LutLanguage::cuda;
    o.cpp_namespace = "lobit_cuda_test";
    o.stem = emit::lut_identifier_stem(std::string("blk_") + sp);
    o.command = std::string("lut_cuda_test ") + sp;
    const auto h = dir / (o.stem + ".cuh");
    write_text(h, emit::emit_block_lut(*parse_scaled(sp), o));
    cu = "#include \"" + h.string() + "\"\n" + cu;
    cu += fmt::format("__global__ void lobit_test_{}(const lobit_cuda_test::lobit_{}_block* b, float* out) {{\n"
                      "  lobit_cuda_test::lobit_{}_dequantize_block(b + blockIdx.x, out + blockIdx.x * LOBIT_{}_BLOCK_SIZE);\n}}\n",
                      o.stem, o.stem, o.stem, [&] { std::string m; for (char ch : o.stem) m += static_cast<char>(std::toupper(ch)); return m; }());
  }
  {
    emit::LutOptions o;
    o.language = emit::LutLanguage::cuda;
    o.cpp_namespace = "lobit_cuda_test";
    o.stem = "prod_e2m1_int4";
    o.command = "lut_cuda_test e2m1 --product int4";
    const auto h = dir / "prod.cuh";
    write_text(h, emit::emit_product_lut(*parse_element("e2m1"), *parse_element("int4"), o));
    cu = "#include \"" + h.string() + "\"\n" + cu;
    cu += "__global__ void lobit_test_product(const unsigned char* a, const unsigned char* b, float* p, int* k) {\n"
          "  const unsigned i = threadIdx.x;\n"
          "  p[i] = lobit_cuda_test::lobit_prod_e2m1_int4_product_f32(a[i], b[i]);\n"
          "  k[i] = lobit_cuda_test::lobit_prod_e2m1_int4_product_k_of(a[i], b[i]);\n}\n";
  }
  const auto kernel = dir / "kernel.cu";
  write_text(kernel, cu);
  const std::string cmd = fmt::format(
      "\"{}\" -std=c++17 -c -Werror all-warnings -Xcompiler -Wall,-Wextra,-Werror --fmad=false -o \"{}\" \"{}\" > \"{}\" 2>&1",
      nvcc, (dir / "kernel.o").string(), kernel.string(), (dir / "kernel.log").string());
  const int rc = std::system(cmd.c_str());
  std::ifstream lf(dir / "kernel.log");
  const std::string klog((std::istreambuf_iterator<char>(lf)), {});
  CHECK_MESSAGE(rc == 0, "nvcc failed: ", cmd, "\n", klog.substr(0, 4000));
  CHECK_MESSAGE(klog.find("warning") == std::string::npos, klog.substr(0, 4000));

  // The host side of the same header compiled by nvcc (with __CUDACC__ defined), loaded and compared.
  const auto src = dir / "wrapper.cu";
  write_text(src, wrapper_source(cases, headers, true, "lobit_cuda_test"));
  const auto so = dir / "wrapper.so";
  const std::string cmd2 = fmt::format(
      "\"{}\" -std=c++17 -shared -Xcompiler -fPIC,-ffp-contract=off,-Wall,-Wextra,-Werror -Werror all-warnings -o \"{}\" \"{}\" > \"{}.log\" 2>&1",
      nvcc, so.string(), src.string(), so.string());
  const int rc2 = std::system(cmd2.c_str());
  std::ifstream lf2(so.string() + ".log");
  const std::string log2((std::istreambuf_iterator<char>(lf2)), {});
  REQUIRE_MESSAGE(rc2 == 0, "nvcc host build failed: ", cmd2, "\n", log2.substr(0, 4000));
  Loaded l;
  l.handle = dlopen(so.c_str(), RTLD_NOW | RTLD_LOCAL);
  REQUIRE_MESSAGE(l.handle != nullptr, dlerror());
  l.entries = static_cast<const WrapperEntry*>(dlsym(l.handle, "lobit_test_entries"));
  auto* cnt = static_cast<const std::size_t*>(dlsym(l.handle, "lobit_test_entry_count"));
  REQUIRE(l.entries != nullptr);
  REQUIRE(cnt != nullptr);
  l.count = *cnt;
  check_all(cases, l);
  dlclose(l.handle);
}
