#pragma once
// Shared pieces of the lobit CLI: number text, code parsing, JSON values.
#include <CLI/CLI.hpp>
#include <nlohmann/json.hpp>
#include <string>

#include "lobit/format/element_format.hpp"

namespace lobit::cli {

// Shortest text that reads back to the same binary64; "-0.0", "nan", "inf".
std::string number_text(double v);
// Hex-float text (exact), e.g. 0x1.cp+8; "nan"/"inf" for specials.
std::string hex_text(double v);
// JSON for a value: a number, or "nan" / "inf" / "-inf".
nlohmann::json json_value(double v);
// Code as 0x.. with as many hex digits as the format needs.
std::string code_hex(Code c, int bits);
// Code bits split into fields for display, e.g. "0.1110.110" (floats), or plain binary.
std::string code_fields(const ElementFormat& f, Code c);

// Header text for a format the user named: their spelling, then the canonical
// spec where it differs and stays readable.
std::string format_title(const std::string& given, const ElementFormat& f);

// Strict parsing; `where` names the argument for the error message.
double parse_number(const std::string& text, const std::string& where);
Code parse_code(const std::string& text, const ElementFormat& f, const std::string& where);

// Writes a whole file or nothing: a temporary file beside it, renamed into place.
void write_file_atomic(const std::string& path, const std::string& content);

// Writes JSON to stdout with 17 significant digits for every double.
void print_json(const nlohmann::json& j);

void add_formats_command(CLI::App& app);
void add_inspect_command(CLI::App& app);
void add_encode_command(CLI::App& app);
void add_decode_command(CLI::App& app);
void add_compare_command(CLI::App& app);
void add_score_command(CLI::App& app);
void add_design_command(CLI::App& app);
void add_lut_command(CLI::App& app);
void add_quantize_command(CLI::App& app);
void add_fit_command(CLI::App& app);

}  // namespace lobit::cli
