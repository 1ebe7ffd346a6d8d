// libFuzzer target: arbitrary bytes as npz input to open_npz (see fuzz_reader.hpp).
#include "fuzz_reader.hpp"
#include "lobit/io/numpy.hpp"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  static const lobit::fuzz::InputFile file("input.npz");
  return lobit::fuzz::read_everything(file, data, size, lobit::io::open_npz);
}
