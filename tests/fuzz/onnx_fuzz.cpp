// libFuzzer target: arbitrary bytes as onnx input to open_onnx (see fuzz_reader.hpp).
#include "fuzz_reader.hpp"
#include "lobit/io/onnx.hpp"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  static const lobit::fuzz::InputFile file("model.onnx");
  (void)lobit::io::looks_like_onnx(data, size < 64 ? size : 64);  // the sniff sees the same bytes
  return lobit::fuzz::read_everything(file, data, size, lobit::io::open_onnx);
}
