// `lobit lut FORMAT ...`: lookup tables, an exact encoder and bit packing for
// kernels, as a C, C++ or CUDA header, or as JSON / CSV data.
#include <fmt/format.h>

#include "common.hpp"
#include "lobit/emit/lut.hpp"
#include "lobit/error.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/scale/scaled_format.hpp"

namespace lobit::cli {

void add_lut_command(CLI::App& app) {
  auto* cmd = app.add_subcommand("lut", "Emit lookup tables, an exact encoder and bit packing for kernels (C, C++, CUDA, "
                                        "JSON, CSV)");
  struct Opts {
    std::string spec, lang = "c", decode_type = "f32", ns = "lobit_gen", pack, out, overflow = "default", name, product;
    bool allow_inexact = false, stochastic = false;
  };
  auto o = std::make_shared<Opts>();
  cmd->add_option("FORMAT", o->spec, "Element format of at most 16 bits, or a block format ELEMENT@K:SCALE (e.g. mxfp4)")->required();
  cmd->add_option("--lang", o->lang, "c (C99 header), cpp (C++17), cuda, json or csv (default c)");
  cmd->add_option("--decode-type", o->decode_type,
                  "Decode table element: f32 (default), f16, bf16, or int (k and one exponent E, value = k * 2^E; "
                  "refused where no 8/16/32-bit k exists)");
  cmd->add_flag("--stochastic", o->stochastic,
                "Also emit lobit_NAME_encode_stochastic(float x, uint32_t random_word): the library's stochastic "
                "rounding bit for bit (c, cpp, cuda)");
  cmd->add_flag("--allow-inexact", o->allow_inexact, "Emit a decode table whose type rounds some values (error stated)");
  cmd->add_option("--namespace", o->ns, "C++ / CUDA namespace (default lobit_gen)");
  cmd->add_option("--pack", o->pack, "Bit order of packed 2-, 4- and 6-bit codes: lo-first (default) or hi-first");
  cmd->add_option("--overflow", o->overflow, "Overflow policy of the encoder: default, saturate or special");
  cmd->add_option("--name", o->name, "Identifier stem: names become lobit_NAME_... (default: from FORMAT)");
  cmd->add_option("--product", o->product, "Emit the product table of FORMAT times this format (both of at most 4 bits)");
  cmd->add_option("--out", o->out, "Write to this file (whole or nothing) instead of stdout");
  cmd->callback([o] {
    emit::LutOptions lo;
    const auto lang = emit::parse_lut_language(o->lang);
    if (!lang) throw usage_error(fmt::format("unknown language '{}'", o->lang), "--lang", "use c, cpp, cuda, json or csv");
    lo.language = *lang;
    const auto dt = emit::parse_decode_type(o->decode_type);
    if (!dt) throw usage_error(fmt::format("unknown element type '{}'", o->decode_type), "--decode-type", "use f32, f16, bf16 or int");
    lo.decode_type = *dt;
    const auto ov = parse_overflow(o->overflow);
    if (!ov) throw usage_error(fmt::format("unknown overflow policy '{}'", o->overflow), "--overflow",
                               "use default, saturate or special");
    lo.overflow = *ov;
    const bool block = o->spec.find('@') != std::string::npos || (find_preset(o->spec) && find_preset(o->spec)->scaled());
    std::shared_ptr<const ScaledFormat> sf;
    if (block) sf = parse_scaled(o->spec);  // its errors name the format
    const std::shared_ptr<const ElementFormat> f = block ? sf->element : parse_element(o->spec);
    if (f->bits() > 16)
      throw usage_error(fmt::format("{} bits is too wide for a lookup table (at most 16 bits, {} codes would be needed)",
                                    f->bits(), f->bits() >= 64 ? std::string("2^64") : fmt::format("2^{}", f->bits())),
                        "format '" + o->spec + "'",
                        "use the arithmetic encoder instead: `lobit encode` or lobit::parse_element(spec)->encode(x)");
    if (!o->pack.empty()) {
      const auto p = emit::parse_pack_order(o->pack);
      if (!p) throw usage_error(fmt::format("unknown bit order '{}'", o->pack), "--pack", "use lo-first or hi-first");
      if (f->bits() != 2 && f->bits() != 4 && f->bits() != 6)
        throw usage_error(fmt::format("packing helpers exist for 2-, 4- and 6-bit codes; this format has {} bits", f->bits()),
                          "--pack", "drop --pack");
      lo.pack = *p;
    }
    lo.allow_inexact = o->allow_inexact;
    lo.stochastic = o->stochastic;
    lo.cpp_namespace = o->ns;
    lo.title = o->spec;
    lo.stem = o->name;
    // The command as parsed, canonical and without the output path, so that the
    // same request always gives the same bytes.
    std::string command = "lobit lut " + o->spec + " --lang " + std::string(emit::to_string(lo.language)) +
                          " --decode-type " + std::string(emit::to_string(lo.decode_type));
    if (lo.allow_inexact) command += " --allow-inexact";
    if (lo.stochastic) command += " --stochastic";
    if (lo.language == emit::LutLanguage::cpp || lo.language == emit::LutLanguage::cuda) command += " --namespace " + o->ns;
    if (!o->pack.empty()) command += " --pack " + o->pack;
    if (o->overflow != "default") command += " --overflow " + o->overflow;
    if (!o->name.empty()) command += " --name " + o->name;
    if (!o->product.empty()) command += " --product " + o->product;
    lo.command = command;
    std::string text;
    if (!o->product.empty()) {
      if (block) throw usage_error("--product takes element formats", "--product", "give the element formats, e.g. e2m1");
      if (lo.stochastic || lo.decode_type == emit::DecodeType::scaled_int)
        throw usage_error("a product table has no encoder and its own integer form", "--product",
                          "drop --stochastic and --decode-type int (the product's k table is always emitted where it exists)");
      const auto fb = parse_element(o->product);
      lo.title = o->spec + "_x_" + o->product;
      text = emit::emit_product_lut(*f, *fb, lo);
    } else {
      text = block ? emit::emit_block_lut(*sf, lo) : emit::emit_lut(*f, lo);
    }
    if (o->out.empty()) fmt::print("{}", text);
    else write_file_atomic(o->out, text);
  });
}

}  // namespace lobit::cli
