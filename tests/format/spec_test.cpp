// Spec text: presets, families, keys, canonical forms and the errors users see.
#include <doctest/doctest.h>

#include "lobit/error.hpp"
#include "lobit/format/minifloat.hpp"
#include "test_util.hpp"

using namespace lobit;
using lobit::test::fmt;

TEST_CASE("every preset's canonical spec parses back to the same format") {
  for (const auto& p : presets()) {
    INFO("preset ", p.name);
    if (p.scaled()) {
      CHECK_THROWS_AS(parse_element(p.name), Error);  // block-scaled: not an element
      continue;
    }
    auto a = fmt(p.name.c_str());
    CHECK_FALSE(p.summary.empty());
    CHECK_FALSE(p.source.empty());
    auto b = parse_element(a->spec());
    CHECK(b->spec() == a->spec());
    if (a->bits() <= 16)
      for (Code c = 0; c <= a->code_count_minus_one(); ++c) CHECK(lobit::test::same_value(a->decode(c), b->decode(c)));
    for (const auto& alias : p.aliases) CHECK(parse_element(alias)->spec() == a->spec());
  }
}

TEST_CASE("keys override a preset; a new exponent or layout resets the bias unless given") {
  CHECK(fmt("e4m3+bias=8")->spec() == "float+exp=4+man=3+bias=8+special=top-nan");
  CHECK(fmt("e4m3+special=negzero-nan")->spec() == "float+exp=4+man=3+bias=8+special=negzero-nan");
  CHECK(fmt("fp16+subnormals=no")->spec() == "float+exp=5+man=10+bias=15+subnormals=no+special=ieee");
  CHECK(fmt("e3m4")->spec() == "float+exp=3+man=4+bias=3+special=ieee");
  CHECK(fmt("float+exp=3+man=2+special=none")->spec() == "float+exp=3+man=2+bias=3+special=none");
  CHECK(fmt("int12")->spec() == "int+bits=12");
  CHECK(fmt("uint4+bits=6")->spec() == "int+bits=6+signed=no");
  CHECK(fmt("int+bits=8+frac=6+range=symmetric")->spec() == fmt("int8-frac6")->spec());
  CHECK(fmt("pow2+exp=8+bias=127+sign=no+zero=no+nan=yes")->spec() == fmt("e8m0")->spec());
  CHECK(fmt("codebook+values=1/-1/0")->spec() == "codebook+values=-1/0/1");
  CHECK(fmt("codebook+values=-1/0/1+bits=4")->bits() == 4);
  CHECK(fmt("normal-quantile+bits=3")->bits() == 3);
}

namespace {
std::string error_of(const char* spec) {
  try {
    parse_element(spec);
  } catch (const Error& e) {
    CHECK(e.kind() == Error::Kind::usage);
    return e.message();
  }
  return "no error";
}
}  // namespace

TEST_CASE("bad specs get one-line errors that say how to fix them") {
  CHECK(error_of("e4m4x").find("did you mean") != std::string::npos);
  CHECK(error_of("fp61").find("fp16") != std::string::npos);
  CHECK(error_of("e4m3+colour=red").find("keys of float") != std::string::npos);
  CHECK(error_of("e4m3+bias").find("key=value") != std::string::npos);
  CHECK(error_of("e4m3+bias=x").find("not an integer") != std::string::npos);
  CHECK(error_of("e4m3+bias=1100").find("bias between") != std::string::npos);
  CHECK(error_of("e4m3+special=weird").find("special=ieee") != std::string::npos);
  CHECK(error_of("e2m1@32:e8m0").find("block-scaled") != std::string::npos);
  CHECK(error_of("codebook+values=1/x").find("not a number") != std::string::npos);
  CHECK(error_of("codebook").find("needs values") != std::string::npos);
  CHECK(error_of("int+bits=20").find("2 to 16") != std::string::npos);
  CHECK(error_of("").find("empty") != std::string::npos);
  CHECK(error_of("missing.toml").find("cannot open") != std::string::npos);
  for (const char* s : {"e4m3+bias=8", "e2m1"}) CHECK(error_of(s) == "no error");
}

TEST_CASE("preset TOML files parse, and bad ones are refused with their location") {
  const Preset p = parse_preset_toml("name = \"mine\"\nvalues = [-1.0, 0.0, 0.5, 1.0]\n", "mine.toml");
  CHECK(p.values.size() == 4);
  CHECK_THROWS_AS(parse_preset_toml("name = \n", "broken.toml"), Error);
  CHECK_THROWS_AS(parse_preset_toml("name = \"x\"\n", "empty.toml"), Error);
  CHECK_THROWS_AS(parse_preset_toml("values = [1.0, \"a\"]\n", "mixed.toml"), Error);
}
