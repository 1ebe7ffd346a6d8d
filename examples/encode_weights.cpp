// A small program that uses the library: encode a few weights in FP4 with
// nearest-even and stochastic rounding and print codes and values.
// Build: part of the default build (target lobit_example_encode_weights).
#include <cstdio>
#include <span>
#include <vector>

#include "lobit/format/bulk.hpp"
#include "lobit/format/spec.hpp"

int main() {
  auto fp4 = lobit::parse_element("e2m1");
  const lobit::Code c = fp4->encode(2.6);  // 0x5 (3.0)
  std::printf("2.6 -> code 0x%llx = %g\n", static_cast<unsigned long long>(c), fp4->decode(c));

  const std::vector<float> w = {0.1f, -2.4f, 5.5f};
  std::vector<lobit::Code> codes(w.size());
  lobit::encode(*fp4, std::span<const float>(w), std::span<lobit::Code>(codes),
                {.rounding = lobit::Rounding::stochastic, .seed = 42});
  for (std::size_t i = 0; i < w.size(); ++i)
    std::printf("%g -> code 0x%llx = %g (stochastic, seed 42)\n", static_cast<double>(w[i]),
                static_cast<unsigned long long>(codes[i]), fp4->decode(codes[i]));
  return 0;
}
