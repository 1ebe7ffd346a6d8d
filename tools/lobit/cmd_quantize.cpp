// `lobit quantize CHECKPOINT --out FILE.safetensors`: a quantized copy of a checkpoint,
// as dequantized values (for evaluation in the user's own framework) or as packed codes
// plus scale tensors; `--dump TENSOR --dump-dir DIR`: one tensor's codes, scales and
// values as .npy files, for diffing against another implementation.
//
// Tensors stream through in row chunks (bounded memory); the figures are the library's
// own quantize-dequantize (scale/quantize.hpp), bit for bit.
#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <cstring>
#include <filesystem>
#include <toml++/toml.h>

#include "checkpoint_args.hpp"
#include "common.hpp"
#include "lobit/error.hpp"
#include "lobit/format/bulk.hpp"
#include "lobit/format/spec.hpp"
#include "lobit/io/numpy.hpp"
#include "lobit/io/safetensors.hpp"
#include "lobit/io/tensor_view.hpp"
#include "lobit/scale/quantize.hpp"
#include "lobit/version.hpp"

namespace lobit::cli {
namespace {

const char* kCaution =
    "quantized weights reproduce lobit's quantize-dequantize exactly; whether they are good enough must be "
    "validated on your own model and evaluation";

struct Rule {
  std::string glob, format;  // format "keep": copied unchanged
};

std::vector<Rule> load_map(const std::string& path) {
  toml::table t;
  try {
    t = toml::parse_file(path);
  } catch (const toml::parse_error& e) {
    throw usage_error(fmt::format("line {}: {}", e.source().begin.line, e.description()), path,
                      "the map is TOML: [[assign]] tables with tensor = \"GLOB\" and format = \"SPEC\" or \"keep\"");
  }
  const toml::array* arr = t["assign"].as_array();
  if (!arr || arr->empty())
    throw usage_error("no [[assign]] tables", path, "add [[assign]] tables with tensor = \"GLOB\" and format = \"SPEC\"");
  std::vector<Rule> rules;
  for (std::size_t i = 0; i < arr->size(); ++i) {
    const toml::table* e = (*arr)[i].as_table();
    const auto glob = e ? (*e)["tensor"].value<std::string>() : std::nullopt;
    const auto format = e ? (*e)["format"].value<std::string>() : std::nullopt;
    if (!glob || !format)
      throw usage_error(fmt::format("[[assign]] number {} needs tensor = \"GLOB\" and format = \"SPEC\"", i + 1), path);
    for (const auto& [k, v] : *e)
      if (k != "tensor" && k != "format")
        throw usage_error(fmt::format("[[assign]] number {}: unknown key '{}'", i + 1, k.str()), path,
                          "the keys are tensor and format");
    if (*format != "keep") (void)parse_scaled(*format);  // reports a bad spec now, before any work
    rules.push_back({*glob, *format});
  }
  return rules;
}

// Output element type for dequantized values.
io::DType value_dtype(const std::string& s) {
  if (s == "f32") return io::DType::f32;
  if (s == "f16") return io::DType::f16;
  if (s == "bf16") return io::DType::bf16;
  throw usage_error(fmt::format("--dtype {}", s), "quantize", "use f32, f16 or bf16");
}

// The folded matrix's chunk height: whole rows, whole axis-0 blocks.
std::uint64_t chunk_rows(const ScaledFormat& f, const io::MatrixView& v) {
  std::uint64_t r = std::max<std::uint64_t>(1, (std::uint64_t{1} << 18) / std::max<std::uint64_t>(v.cols, 1));
  if (v.axis == 0 && f.granularity == Granularity::block) {
    const auto k = static_cast<std::uint64_t>(f.block);
    r = (r + k - 1) / k * k;
  }
  return std::min(r, v.rows);
}

// Packs one row of codes into a little-endian bit stream, code i at bits [i*b, i*b + b).
void pack_row(const Code* codes, std::uint64_t n, int bits, std::vector<unsigned char>& out) {
  out.assign(static_cast<std::size_t>((n * static_cast<std::uint64_t>(bits) + 7) / 8), 0);
  std::uint64_t bit = 0;
  for (std::uint64_t i = 0; i < n; ++i, bit += static_cast<std::uint64_t>(bits))
    for (int k = 0; k < bits; ++k)
      if ((codes[i] >> k) & 1u) out[static_cast<std::size_t>((bit + static_cast<std::uint64_t>(k)) / 8)] |=
          static_cast<unsigned char>(1u << ((bit + static_cast<std::uint64_t>(k)) % 8));
}

io::DType code_dtype(int bits) { return bits <= 8 ? io::DType::u8 : io::DType::u16; }

void append_code(std::vector<unsigned char>& buf, Code c, int bits) {
  if (bits <= 8) {
    buf.push_back(static_cast<unsigned char>(c));
  } else {
    const auto v = static_cast<std::uint16_t>(c);
    buf.push_back(static_cast<unsigned char>(v & 0xff));
    buf.push_back(static_cast<unsigned char>(v >> 8));
  }
}

// Shape of the per-group scale tensor.
std::vector<std::uint64_t> scale_shape(const ScaledFormat& f, const TensorPlan& p) {
  switch (f.granularity) {
    case Granularity::block:
      return p.axis == 1 ? std::vector<std::uint64_t>{p.rows, p.blocks_along}
                         : std::vector<std::uint64_t>{p.blocks_along, p.cols};
    case Granularity::row: return {p.rows};
    case Granularity::col: return {p.cols};
    default: return {1};
  }
}

struct Assignment {
  std::size_t index;
  std::shared_ptr<const ScaledFormat> format;  // null: copied unchanged
  std::string why;                             // why copied, for the summary
  io::MatrixView view;
  std::string axis_reason;
  bool assumed = false;
  TensorPlan plan;
};

// One pass to build the plan (when the format needs the whole tensor first).
TensorPlan make_plan(const io::Checkpoint& c, const Assignment& a) {
  PlanBuilder pb(*a.format, a.view.rows, a.view.cols, a.view.axis);
  if (pb.needs_data()) {
    io::StoredTensorSource src(c, a.index, a.view);
    const std::uint64_t step = chunk_rows(*a.format, a.view);
    std::vector<float> buf;
    for (std::uint64_t r = 0; r < a.view.rows; r += step) {
      const std::uint64_t n = std::min(step, a.view.rows - r);
      buf.resize(static_cast<std::size_t>(n * a.view.cols));
      src.fill_rows(r, n, buf.data());
      pb.add_rows(r, n, buf.data());
    }
  }
  return pb.finish();
}

// Quantizes a tensor chunk by chunk, handing each chunk's codes and values (storage
// order) and its groups' scales to the sinks.
template <class ChunkSink, class GroupSink>
void quantize_stream(const io::Checkpoint& c, const Assignment& a, ChunkSink&& chunk, GroupSink&& group) {
  const ScaledFormat& f = *a.format;
  io::StoredTensorSource src(c, a.index, a.view);
  const std::uint64_t step = chunk_rows(f, a.view);
  std::vector<float> in;
  std::vector<Code> codes;
  std::vector<double> values;
  for (std::uint64_t r0 = 0; r0 < a.view.rows; r0 += step) {
    const std::uint64_t n = std::min(step, a.view.rows - r0);
    const std::size_t m = static_cast<std::size_t>(n * a.view.cols);
    in.resize(m);
    codes.assign(m, 0);
    values.assign(m, 0.0);
    src.fill_rows(r0, n, in.data());
    quantize_rows_dense(f, a.plan, r0, n, in.data(), codes.data(), values.data(), group);
    chunk(r0, n, in, codes, values);
  }
}

void write_values(const ElementFormat* half, io::DType dt, const std::vector<double>& v, std::vector<unsigned char>& out,
                  std::uint64_t& inexact, double& worst_rel) {
  out.resize(v.size() * static_cast<std::size_t>(io::dtype_bytes(dt)));
  if (dt == io::DType::f32) {
    for (std::size_t i = 0; i < v.size(); ++i) {
      const float x = static_cast<float>(v[i]);
      if (!(static_cast<double>(x) == v[i]) && !(std::isnan(x) && std::isnan(v[i]))) {
        ++inexact;
        if (v[i] != 0 && std::isfinite(x)) worst_rel = std::max(worst_rel, std::fabs((x - v[i]) / v[i]));
        else worst_rel = INFINITY;
      }
      std::memcpy(&out[i * 4], &x, 4);
    }
    return;
  }
  std::vector<Code> codes(v.size());
  encode(*half, std::span<const double>(v), std::span<Code>(codes));
  for (std::size_t i = 0; i < v.size(); ++i) {
    const double back = half->decode(codes[i]);
    if (!(back == v[i]) && !(std::isnan(back) && std::isnan(v[i]))) {
      ++inexact;
      if (v[i] != 0 && std::isfinite(back)) worst_rel = std::max(worst_rel, std::fabs((back - v[i]) / v[i]));
      else worst_rel = INFINITY;
    }
    const auto b = static_cast<std::uint16_t>(codes[i]);
    out[2 * i] = static_cast<unsigned char>(b & 0xff);
    out[2 * i + 1] = static_cast<unsigned char>(b >> 8);
  }
}

std::string file_safe(const std::string& name) {
  std::string s;
  for (char ch : name) s += (std::isalnum(static_cast<unsigned char>(ch)) || ch == '.' || ch == '-' || ch == '_') ? ch : '_';
  return s;
}

}  // namespace

void add_quantize_command(CLI::App& app) {
  auto* cmd = app.add_subcommand(
      "quantize", "Write a quantized copy of a checkpoint (safetensors), or dump one tensor's codes, scales and values");
  struct Opts {
    std::string input, out, format, map, store = "values", dtype = "f32", dump, dump_dir;
    TensorFilter filter;
    AxisOptions axes;
  };
  auto o = std::make_shared<Opts>();
  cmd->add_option("CHECKPOINT", o->input, "Input checkpoint (.safetensors or index .json, .npy, .npz, .onnx)")->required();
  cmd->add_option("--out", o->out, "Output .safetensors file (written whole or not at all)");
  cmd->add_option("--format", o->format, "Format for every selected tensor: ELEMENT or ELEMENT@BLOCK:SCALE[,options]");
  cmd->add_option("--map", o->map,
                  "TOML file of [[assign]] tables (tensor = \"GLOB\", format = \"SPEC\" or \"keep\"); first match "
                  "wins, --format (if given) covers the rest");
  cmd->add_option("--store", o->store,
                  "values: dequantized values in --dtype (default); codes: packed element codes plus scale "
                  "(and zero-point) code tensors, layout in the file's metadata");
  cmd->add_option("--dtype", o->dtype, "Type of dequantized values: f32 (default, exact for most formats), f16, bf16");
  cmd->add_option("--dump", o->dump, "Write one tensor's input, codes, scales and values as .npy files instead");
  cmd->add_option("--dump-dir", o->dump_dir, "Folder for --dump (default: the current folder)");
  o->filter.add_options(*cmd);
  o->axes.add_options(*cmd);
  cmd->callback([o] {
    o->axes.resolve();
    std::vector<Rule> rules;
    if (!o->map.empty()) rules = load_map(o->map);
    if (!o->format.empty()) rules.push_back({"*", o->format});
    if (rules.empty()) throw usage_error("no format given", "quantize", "give --format SPEC or --map FILE");
    if (o->store != "values" && o->store != "codes")
      throw usage_error(fmt::format("--store {}", o->store), "quantize", "use values or codes");
    const io::DType vdt = value_dtype(o->dtype);
    const auto ckpt = io::open_checkpoint(o->input);

    auto assign = [&](std::size_t i) {
      const io::TensorInfo& t = ckpt->tensors()[i];
      Assignment a;
      a.index = i;
      std::string why;
      if (!o->filter.selects(t, &why)) {
        a.why = why;
        return a;
      }
      const Rule* r = nullptr;
      for (const auto& x : rules)
        if (io::glob_match(x.glob, t.name)) {
          r = &x;
          break;
        }
      if (!r) {
        a.why = "no rule of the map matches";
        return a;
      }
      if (r->format == "keep") {
        a.why = "kept by the map";
        return a;
      }
      a.format = parse_scaled(r->format);
      const io::AxisChoice ch = o->axes.choose(t);
      a.view = io::fold(t, ch.reduce);
      a.axis_reason = ch.reason;
      a.assumed = ch.assumed;
      return a;
    };

    if (!o->dump.empty()) {
      if (!o->out.empty()) throw usage_error("--dump writes .npy files; leave out --out", "quantize");
      const auto idx = ckpt->find(o->dump);
      if (!idx)
        throw usage_error(fmt::format("no tensor \"{}\"", o->dump), o->input, "`lobit fit FILE` lists the tensors");
      Assignment a = assign(*idx);
      if (!a.format) throw usage_error(fmt::format("tensor \"{}\" is not quantized: {}", o->dump, a.why), o->input);
      const std::uint64_t n = a.view.rows * a.view.cols;
      if (n > (std::uint64_t{1} << 26))
        throw usage_error(fmt::format("tensor \"{}\" has {} elements; --dump holds one tensor in memory", o->dump, n),
                          o->input, "dump a tensor of at most 2^26 elements");
      std::vector<float> data(static_cast<std::size_t>(n));
      ckpt->read_f32(*idx, 0, n, data.data());
      const QuantizedTensor q = quantize_tensor(*a.format, data, a.view.rows, a.view.cols, a.view.axis);
      namespace fsys = std::filesystem;
      const fsys::path dir = o->dump_dir.empty() ? fsys::path(".") : fsys::path(o->dump_dir);
      const std::string stem = (dir / file_safe(o->dump)).string();
      const std::vector<std::uint64_t> mshape{a.view.rows, a.view.cols};
      auto write_npy = [&](const std::string& suffix, io::DType dt, std::vector<std::uint64_t> shape, const void* p,
                           std::uint64_t bytes) {
        io::NpyWriter w(stem + suffix, dt, std::move(shape));
        w.write(p, bytes);
        w.commit();
        fmt::print("{}{}\n", stem, suffix);
      };
      const int eb = a.format->code_element->bits(), sb = a.format->scale ? a.format->scale->bits() : 0;
      auto narrow = [](const std::vector<Code>& v, int bits) {
        std::vector<unsigned char> b;
        for (Code c : v) append_code(b, c, bits);
        return b;
      };
      write_npy(".input.npy", io::DType::f32, mshape, data.data(), n * 4);
      const auto cb = narrow(q.codes, eb);
      write_npy(".codes.npy", code_dtype(eb), mshape, cb.data(), cb.size());
      write_npy(".values.npy", io::DType::f64, mshape, q.values.data(), n * 8);
      write_npy(".scales.npy", io::DType::f64, {q.scales.size()}, q.scales.data(), q.scales.size() * 8);
      if (sb) {
        const auto sc = narrow(q.scale_codes, sb);
        write_npy(".scale_codes.npy", code_dtype(sb), {q.scale_codes.size()}, sc.data(), sc.size());
      }
      if (a.format->zero)
        write_npy(".zeros.npy", io::DType::f64, {q.zeros.size()}, q.zeros.data(), q.zeros.size() * 8);
      fmt::print("# tensor \"{}\" {} as a {} x {} matrix reduced over {} ({}); format {}; tensor scale {}\n", o->dump,
                 ckpt->tensors()[*idx].shape_text(), a.view.rows, a.view.cols, a.view.text, a.axis_reason,
                 a.format->text, number_text(q.tensor_scale));
      fmt::print("# values = scale of the element's group x decoded code (affine: scale x (code - zero)); groups in "
                 "order {}\n",
                 a.view.axis == 1 ? "row by row, blocks along each row" : "block row by block row, columns within");
      return;
    }
    if (o->out.empty()) throw usage_error("no output file", "quantize", "give --out FILE.safetensors (or --dump)");

    std::vector<Assignment> as;
    for (std::size_t i = 0; i < ckpt->tensors().size(); ++i) as.push_back(assign(i));
    // Plans first (they fix the scale tensors' shapes), then the output plan.
    std::vector<io::PlannedTensor> plan;
    std::vector<std::pair<std::string, std::string>> meta{
        {"lobit.version", fmt::format("{} (git {})", version(), git_revision())},
        {"lobit.source", o->input},
        {"lobit.store", o->store}};
    if (o->store == "codes")
      meta.push_back({"lobit.layout",
                      "NAME: element codes of the tensor in its storage order seen as the matrix of lobit.NAME "
                      "(rows x cols), each row packed as a little-endian bit stream (code i at bits i*b..i*b+b-1, "
                      "rows padded to whole bytes; b > 8: one little-endian u16 per code); NAME.scale_codes: the "
                      "group scales' codes in the scale format (u8, or u16 for wider scales), shape [rows, blocks] "
                      "for blocks along rows, [blocks, cols] for blocks down columns, [rows] / [cols] / [1] for row, "
                      "column and tensor scales; NAME.zero_codes: affine zero points, same shape; "
                      "NAME.tensor_scale: the decoded per-tensor scale of two-level formats (f64). value = "
                      "tensor_scale x decode(scale code) x decode(element code)"});
    std::uint64_t quantized = 0, copied = 0, assumed = 0;
    for (auto& a : as) {
      const io::TensorInfo& t = ckpt->tensors()[a.index];
      if (!a.format) {
        if (t.fortran_order && t.count() > 1 && t.shape.size() > 1)
          throw usage_error(fmt::format("tensor \"{}\" is stored in Fortran order; safetensors holds C order", t.name),
                            o->input, "save the array in C order (numpy.ascontiguousarray) first");
        plan.push_back({t.name, t.dtype, t.shape});
        ++copied;
        continue;
      }
      const ScaledFormat& f = *a.format;
      if (o->store == "codes" && (f.scales || f.sub_block))
        throw usage_error(fmt::format("tensor \"{}\": format {} has {}; --store codes has no layout for it", t.name,
                                      f.text, f.scales ? "double-quantized scales" : "shared micro-exponents"),
                          "quantize", "use --store values, or a format without scales= / sub=");
      a.plan = make_plan(*ckpt, a);
      ++quantized;
      assumed += a.assumed;
      if (o->store == "values") {
        plan.push_back({t.name, vdt, t.shape});
      } else {
        const int eb = f.code_element->bits();
        const std::uint64_t row_bytes = eb <= 8 ? (a.view.cols * static_cast<std::uint64_t>(eb) + 7) / 8 : a.view.cols * 2;
        plan.push_back({t.name, io::DType::u8, {a.view.rows, row_bytes}});
        if (f.scale) plan.push_back({t.name + ".scale_codes", code_dtype(f.scale->bits()), scale_shape(f, a.plan)});
        if (f.zero) plan.push_back({t.name + ".zero_codes", code_dtype(f.zero->bits()), scale_shape(f, a.plan)});
        if (f.tensor_scale) plan.push_back({t.name + ".tensor_scale", io::DType::f64, {}});
      }
      nlohmann::json m = {{"format", f.text},          {"shape", t.shape},
                          {"rows", a.view.rows},        {"cols", a.view.cols},
                          {"axis", a.view.axis},        {"reduced_over", a.view.text},
                          {"axis_reason", a.axis_reason}, {"element_bits", f.code_element->bits()},
                          {"scale_bits", f.scale ? f.scale->bits() : 0}, {"tensor_scale", a.plan.tensor_scale}};
      meta.push_back({"lobit." + t.name, m.dump()});
      if (o->store == "values") {  // read back as the tensor's axis hint (safetensors reader)
        std::string axes;
        for (int r : a.view.reduce) axes += (axes.empty() ? "" : ",") + std::to_string(r);
        if (!axes.empty()) meta.push_back({"lobit.axes." + t.name, axes});
      }
    }
    if (quantized == 0) throw usage_error("no tensor selected for quantization", o->input, "check --tensor and the map");
    io::SafetensorsWriter w(o->out, plan, meta);
    const ElementFormat* half = nullptr;
    std::shared_ptr<const ElementFormat> half_fmt;
    if (vdt != io::DType::f32) half_fmt = parse_element(vdt == io::DType::f16 ? "fp16" : "bf16"), half = half_fmt.get();
    std::uint64_t inexact = 0;
    double worst = 0;
    std::vector<unsigned char> bytes, packed;
    for (const auto& a : as) {
      const io::TensorInfo& t = ckpt->tensors()[a.index];
      if (!a.format) {  // copied as stored (byte order made little-endian)
        const std::uint64_t n = t.count(), step = std::uint64_t{1} << 18;
        const int wb = io::dtype_bytes(t.dtype);
        for (std::uint64_t e = 0; e < n; e += step) {
          const std::uint64_t k = std::min(step, n - e);
          bytes.resize(static_cast<std::size_t>(k) * static_cast<std::size_t>(wb));
          ckpt->read_raw(a.index, e, k, bytes.data());
          if (t.big_endian && wb > 1)
            for (std::size_t i = 0; i < bytes.size(); i += static_cast<std::size_t>(wb))
              std::reverse(bytes.begin() + static_cast<std::ptrdiff_t>(i), bytes.begin() + static_cast<std::ptrdiff_t>(i) + wb);
          w.write(bytes.data(), bytes.size());
        }
        continue;
      }
      const ScaledFormat& f = *a.format;
      io::ScratchFile scales, zeros;
      std::vector<unsigned char> sbuf, zbuf;
      const int eb = f.code_element->bits();
      if (o->store == "values" && t.fortran_order && t.shape.size() > 1)
        throw usage_error(fmt::format("tensor \"{}\" is stored in Fortran order; safetensors holds C order", t.name),
                          o->input, "save the array in C order (numpy.ascontiguousarray) first");
      quantize_stream(
          *ckpt, a,
          [&](std::uint64_t, std::uint64_t n, const std::vector<float>&, const std::vector<Code>& codes,
              const std::vector<double>& values) {
            if (o->store == "values") {
              write_values(half, vdt, values, bytes, inexact, worst);
              w.write(bytes.data(), bytes.size());
              return;
            }
            for (std::uint64_t r = 0; r < n; ++r) {
              const Code* row = codes.data() + r * a.view.cols;
              if (eb <= 8) {
                pack_row(row, a.view.cols, eb, packed);
              } else {
                packed.clear();
                for (std::uint64_t c = 0; c < a.view.cols; ++c) append_code(packed, row[c], 16);
              }
              w.write(packed.data(), packed.size());
            }
          },
          [&](const GroupView& g) {
            if (o->store != "codes") return;
            if (f.scale) {
              sbuf.clear();
              append_code(sbuf, g.scale->scale_code, f.scale->bits());
              scales.append(sbuf.data(), sbuf.size());
            }
            if (f.zero) {
              zbuf.clear();
              append_code(zbuf, g.scale->zero_code, f.zero->bits());
              zeros.append(zbuf.data(), zbuf.size());
            }
          });
      if (o->store == "codes") {
        auto copy = [&](const io::ScratchFile& s) {
          std::vector<unsigned char> b(1 << 20);
          for (std::uint64_t off = 0; off < s.size(); off += b.size()) {
            const std::uint64_t k = std::min<std::uint64_t>(b.size(), s.size() - off);
            s.read_at(off, b.data(), k);
            w.write(b.data(), k);
          }
        };
        if (f.scale) copy(scales);
        if (f.zero) copy(zeros);
        if (f.tensor_scale) w.write(&a.plan.tensor_scale, 8);
      }
    }
    w.commit();
    fmt::print("# wrote {}: {} tensors quantized ({}), {} copied unchanged\n", o->out, quantized,
               o->store == "values" ? fmt::format("dequantized values in {}", o->dtype) : "codes and scale codes",
               copied);
    for (const auto& a : as)
      if (a.format)
        fmt::print("  {}  {}  reduced over {}{}{}\n", ckpt->tensors()[a.index].name, a.format->text, a.view.text,
                   a.assumed ? " (assumed: " + a.axis_reason + ")" : "",
                   ckpt->tensors()[a.index].dtype == io::DType::f64 ? " (f64 input: quantized from its float32 rounding)"
                                                                     : "");
    for (const auto& a : as)
      if (!a.format) fmt::print("  {}  copied ({})\n", ckpt->tensors()[a.index].name, a.why);
    if (inexact)
      fmt::print("# warning: {} dequantized values were rounded to {} (largest relative change {:.3g}); use --dtype f32 "
                 "for exact values\n",
                 inexact, o->dtype, worst);
    if (assumed)
      std::fprintf(stderr,
                   "lobit: warning: %llu tensor(s) had no reduction axis in the file; the default by rank was assumed "
                   "(set --axis GLOB=AXES)\n",
                   static_cast<unsigned long long>(assumed));
    fmt::print("# {}\n", kCaution);
  });
}

}  // namespace lobit::cli
