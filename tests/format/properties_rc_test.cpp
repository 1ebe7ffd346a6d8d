// Properties that hold for every code of every format up to 16 bits, checked on
// random parameterisations with rapidcheck.
#include <doctest/doctest.h>
#include <rapidcheck.h>

#include <cmath>

#include "lobit/error.hpp"
#include "lobit/format/codebook.hpp"
#include "lobit/format/integer.hpp"
#include "lobit/format/minifloat.hpp"
#include "lobit/format/power_of_two.hpp"
#include "lobit/format/properties.hpp"
#include "lobit/format/value_table.hpp"
#include "test_util.hpp"

using namespace lobit;

namespace {

std::shared_ptr<const ElementFormat> random_format() {
  const int family = *rc::gen::inRange(0, 4);
  if (family == 0) {
    MinifloatParams p;
    p.exp_bits = *rc::gen::inRange(0, 7);
    p.man_bits = *rc::gen::inRange(0, 7);
    p.sign = *rc::gen::arbitrary<bool>();
    p.subnormals = p.exp_bits == 0 ? true : *rc::gen::arbitrary<bool>();
    p.special = *rc::gen::element(SpecialValues::ieee, SpecialValues::top_nan, SpecialValues::neg_zero_nan,
                                  SpecialValues::none);
    p.bias = MinifloatParams::default_bias(p.exp_bits, p.special) + *rc::gen::inRange(-3, 4);
    RC_PRE((p.sign ? 1 : 0) + p.exp_bits + p.man_bits >= 2);
    try {
      return std::make_shared<Minifloat>(p);
    } catch (const Error&) {
      RC_DISCARD("impossible parameters");
    }
  }
  if (family == 1) {
    const bool sign = *rc::gen::arbitrary<bool>();
    return std::make_shared<Integer>(IntegerParams{*rc::gen::inRange(2, 13), sign,
                                                   sign && *rc::gen::arbitrary<bool>(), *rc::gen::inRange(0, 8)});
  }
  if (family == 2) {
    PowerOfTwoParams p{*rc::gen::inRange(1, 8), 0, *rc::gen::arbitrary<bool>(), *rc::gen::arbitrary<bool>(),
                       *rc::gen::arbitrary<bool>()};
    p.bias = (1 << (p.exp_bits - 1)) - 1 + *rc::gen::inRange(-2, 3);
    try {
      return std::make_shared<PowerOfTwo>(p);
    } catch (const Error&) {
      RC_DISCARD("impossible parameters");
    }
  }
  auto raw = *rc::gen::container<std::vector<int>>(*rc::gen::inRange(2, 40), rc::gen::inRange(-100000, 100000));
  std::sort(raw.begin(), raw.end());
  raw.erase(std::unique(raw.begin(), raw.end()), raw.end());
  RC_PRE(raw.size() >= 2u);
  std::vector<double> v;
  for (int x : raw) v.push_back(x / 1024.0);
  return std::make_shared<Codebook>(v);
}

}  // namespace

TEST_CASE("rapidcheck: encode properties on every code of random formats") {
  CHECK(rc::check("decode . encode . decode is the identity on finite codes", [] {
    auto f = random_format();
    for (Code c = 0; c <= f->code_count_minus_one(); ++c) {
      if (!lobit::test::is_finite_class(f->classify(c))) continue;
      const double v = f->decode(c);
      for (Rounding r : lobit::test::all_roundings)
        RC_ASSERT(lobit::test::same_value(f->decode(f->encode(v, r, Overflow::special, *rc::gen::arbitrary<std::uint32_t>())), v) ||
                  (v == 0 && !f->has_negative_zero() && f->decode(f->encode(v, r)) == 0));
    }
  }));

  CHECK(rc::check("nearest modes are monotone and within half a spacing", [] {
    auto f = random_format();
    const ValueTable t(*f);
    const auto& v = t.values();
    RC_PRE(v.size() >= 2u);
    const double lo = v.front(), hi = v.back();
    auto xs = *rc::gen::container<std::vector<double>>(
        50, rc::gen::map(rc::gen::inRange(0, 1 << 20), [&](int k) { return lo + (hi - lo) * (k / double(1 << 20)); }));
    std::sort(xs.begin(), xs.end());
    for (Rounding r : {Rounding::nearest_even, Rounding::nearest_away}) {
      double prev = -INFINITY;
      for (double x : xs) {
        const double q = f->decode(f->encode(x, r));
        RC_ASSERT(q >= prev);
        prev = q;
        const std::size_t i = std::min<std::size_t>(t.index_of_value(x), v.size() - 1);
        const double up = v[i], down = i > 0 ? v[i - 1] : v[i];
        RC_ASSERT(std::fabs(q - x) <= std::min(std::fabs(up - x), std::fabs(x - down)));
        RC_ASSERT(std::fabs(q - x) <= (up - down) / 2 || up == down);
      }
    }
  }));

  CHECK(rc::check("ties go to the stated side", [] {
    auto f = random_format();
    const ValueTable t(*f);
    for (std::size_t i = 0; i < t.thresholds().size(); ++i) {
      const Threshold& th = t.thresholds()[i];
      if (!th.exact_in_double()) continue;
      const Code lo = t.codes()[i], hi = t.codes()[i + 1];
      const Code ne = f->encode(th.nearest, Rounding::nearest_even);
      const Code na = f->encode(th.nearest, Rounding::nearest_away);
      const double vlo = f->decode(lo), vhi = f->decode(hi);
      const double qne = f->decode(ne), qna = f->decode(na);
      // nearest-even: the neighbour whose code is even (both even: the smaller magnitude)
      if ((lo & 1) != (hi & 1)) RC_ASSERT(qne == ((hi & 1) == 0 ? vhi : vlo));
      else RC_ASSERT(qne == (std::fabs(vhi) < std::fabs(vlo) ? vhi : vlo));
      RC_ASSERT(std::fabs(qna) == std::max(std::fabs(vlo), std::fabs(vhi)));
    }
  }));

  CHECK(rc::check("directed modes bracket the input", [] {
    auto f = random_format();
    const ValueTable t(*f);
    const double lo = t.values().front(), hi = t.values().back();
    const double x = lo + (hi - lo) * (*rc::gen::inRange(0, 1000000) / 1e6);
    RC_ASSERT(f->decode(f->encode(x, Rounding::down)) <= x);
    RC_ASSERT(f->decode(f->encode(x, Rounding::up)) >= x);
    // Toward zero never grows the magnitude, unless no value is smaller
    // (formats without zero keep the smallest magnitude of the input's sign).
    const auto& v = t.values();
    const bool has_zero = std::binary_search(v.begin(), v.end(), 0.0);
    double min_mag = INFINITY;
    for (double y : v)
      if ((y < 0) == (x < 0)) min_mag = std::min(min_mag, std::fabs(y));  // same side as x
    if (has_zero || std::fabs(x) >= min_mag)
      RC_ASSERT(std::fabs(f->decode(f->encode(x, Rounding::toward_zero))) <= std::fabs(x));
  }));

  CHECK(rc::check("minifloat closed-form properties equal enumeration", [] {
    MinifloatParams p;
    p.exp_bits = *rc::gen::inRange(0, 9);
    p.man_bits = *rc::gen::inRange(0, 8);
    p.sign = *rc::gen::arbitrary<bool>();
    p.subnormals = p.exp_bits == 0 ? true : *rc::gen::arbitrary<bool>();
    p.special = *rc::gen::element(SpecialValues::ieee, SpecialValues::top_nan, SpecialValues::neg_zero_nan,
                                  SpecialValues::none);
    p.bias = MinifloatParams::default_bias(p.exp_bits, p.special) + *rc::gen::inRange(-3, 4);
    RC_PRE((p.sign ? 1 : 0) + p.exp_bits + p.man_bits >= 2 && (p.sign ? 1 : 0) + p.exp_bits + p.man_bits <= 16);
    std::unique_ptr<Minifloat> f;
    try {
      f = std::make_unique<Minifloat>(p);
    } catch (const Error&) {
      RC_DISCARD("impossible parameters");
    }
    const FormatProperties a = minifloat_properties_closed_form(*f), b = properties(*f);
    RC_ASSERT(a.max_finite == b.max_finite);
    RC_ASSERT(a.lowest_finite == b.lowest_finite);
    RC_ASSERT(a.min_normal == b.min_normal);
    RC_ASSERT(a.min_subnormal == b.min_subnormal);
    RC_ASSERT(a.min_positive == b.min_positive);
    RC_ASSERT(a.distinct_finite == b.distinct_finite);
    RC_ASSERT(a.nan_codes == b.nan_codes);
    RC_ASSERT(a.infinity_codes == b.infinity_codes);
    RC_ASSERT(a.unused_codes == b.unused_codes);
    RC_ASSERT(a.negative_zero == b.negative_zero);
    RC_ASSERT(a.rel_spacing_min == doctest::Approx(b.rel_spacing_min).epsilon(1e-15));
    RC_ASSERT(a.rel_spacing_max == doctest::Approx(b.rel_spacing_max).epsilon(1e-15));
  }));
}
