// The streaming scorer against the closed form, on the library's own
// synthetic sources: Monte Carlo agrees with the exact MSE within 4.5 standard
// errors for every scalar preset up to 16 bits (a 95% interval would fail
// somewhere by chance across dozens of checks). The exact values are the
// project's own closed forms, themselves checked against published tables in
// tests/design and tests/measure.
#include <doctest/doctest.h>

#include <cmath>
#include <fmt/format.h>

#include "lobit/format/spec.hpp"
#include "lobit/measure/exact_error.hpp"
#include "lobit/measure/score.hpp"
#include "lobit/source/synthetic.hpp"

using namespace lobit;

namespace {
class Synth final : public TensorSource {
 public:
  Synth(const std::string& spec, std::uint64_t rows, std::uint64_t cols, std::uint64_t seed)
      : s_([&] {
          SourceSpec sp = parse_source(spec);
          sp.rows = rows;
          sp.cols = cols;
          return SyntheticSource(sp, seed);
        }()) {}
  std::uint64_t rows() const override { return s_.rows(); }
  std::uint64_t cols() const override { return s_.cols(); }
  void fill_rows(std::uint64_t r0, std::uint64_t n, float* out) const override {
    s_.fill(r0 * s_.cols(), std::span<float>(out, n * s_.cols()));
  }
  std::string name() const override { return canonical(s_.spec()); }

 private:
  SyntheticSource s_;
};
}  // namespace

TEST_CASE("Monte Carlo MSE agrees with the closed form for every scalar preset up to 16 bits") {
  for (const char* density : {"gauss", "laplace", "uniform"}) {
    const Synth src(density, 512, 1024, 77);  // 2^19 samples
    std::vector<std::shared_ptr<const ScaledFormat>> fs;
    std::vector<const Preset*> ps;
    for (const auto& p : presets()) {
      if (p.scaled()) continue;
      auto e = parse_element(p.name);
      if (e->bits() > 16) continue;
      // Put each format's range over the data, with the element max far enough out
      // (8 sigma; 20 for the Laplace tail) that rare clipping does not dominate the
      // error: the group-level standard error is reliable only for errors that many
      // groups share.
      const double reach = std::string(density) == "laplace" ? 20.0 : 8.0;
      const double scale = reach / element_max(*e);
      fs.push_back(parse_scaled(p.name + ",scale=" + fmt::format("{}", scale)));
      ps.push_back(&p);
    }
    ScoreOptions o;
    o.chunk_elements = 1 << 14;
    const ScoreResult r = score(fs, src, o);
    for (std::size_t i = 0; i < fs.size(); ++i) {
      const std::string what = std::string(density) + " " + fs[i]->text;
      INFO(what);
      const ErrorReport& e = r.rows[i].report;
      const ExactError x = exact_mse(*fs[i]->element, *parse_density(density), fs[i]->fixed_scale);
      REQUIRE(e.mse_stderr > 0);
      CHECK(std::fabs(e.mse - x.mse) <= 4.5 * e.mse_stderr);
    }
  }
}
