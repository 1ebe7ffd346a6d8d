// libFuzzer target: arbitrary bytes as safetensors input to open_safetensors (see fuzz_reader.hpp).
#include "fuzz_reader.hpp"
#include "lobit/io/safetensors.hpp"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  static const lobit::fuzz::InputFile file("input.safetensors");
  return lobit::fuzz::read_everything(file, data, size, lobit::io::open_safetensors);
}
