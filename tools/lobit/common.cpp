#include "common.hpp"

#include <cerrno>
#include <charconv>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <fmt/format.h>

#include "lobit/detail/number_text.hpp"
#include "lobit/error.hpp"
#include "lobit/format/minifloat.hpp"
#include "lobit/format/power_of_two.hpp"

namespace lobit::cli {

std::string number_text(double v) {
  if (std::isnan(v)) return "nan";
  if (std::isinf(v)) return v > 0 ? "inf" : "-inf";
  std::string s = fmt::format("{}", v);
  if (s.find_first_of(".en") == std::string::npos) s += ".0";
  return s;
}

std::string hex_text(double v) { return detail::hex_text(v); }

nlohmann::json json_value(double v) {
  if (std::isnan(v)) return "nan";
  if (std::isinf(v)) return v > 0 ? "inf" : "-inf";
  return v;
}

std::string code_hex(Code c, int bits) {
  const int digits = (bits + 3) / 4;
  return fmt::format("0x{:0{}x}", c, digits);
}

std::string code_fields(const ElementFormat& f, Code c) {
  std::string bin;
  for (int i = f.bits() - 1; i >= 0; --i) bin += ((c >> i) & 1) ? '1' : '0';
  if (auto* m = dynamic_cast<const Minifloat*>(&f)) {
    const auto& p = m->params();
    std::string out;
    std::size_t pos = 0;
    if (p.sign) out += bin.substr(pos, 1) + ".", pos += 1;
    if (p.exp_bits) out += bin.substr(pos, p.exp_bits), pos += p.exp_bits;
    if (p.man_bits) out += (p.exp_bits ? "." : "") + bin.substr(pos);
    return out;
  }
  if (auto* q = dynamic_cast<const PowerOfTwo*>(&f)) {
    if (q->params().sign) return bin.substr(0, 1) + "." + bin.substr(1);
  }
  return bin;
}

std::string format_title(const std::string& given, const ElementFormat& f) {
  const std::string canon = f.spec();
  if (canon == given) return canon;
  if (canon.size() <= 100) return given + " = " + canon;
  return fmt::format("{} ({}, {} bits)", given, f.family(), f.bits());
}

double parse_number(const std::string& text, const std::string& where) {
  char* end = nullptr;
  errno = 0;
  const double v = std::strtod(text.c_str(), &end);
  if (text.empty() || end != text.c_str() + text.size() || std::isspace(static_cast<unsigned char>(text[0])))
    throw usage_error(fmt::format("'{}' is not a number", text), where,
                      "write a decimal (1.5, -2e-3), a hex float (0x1.8p+0), inf or nan");
  if (errno == ERANGE && std::isinf(v))
    throw usage_error(fmt::format("'{}' is beyond binary64's range", text), where, "write inf if you mean it");
  return v;
}

Code parse_code(const std::string& text, const ElementFormat& f, const std::string& where) {
  std::string_view s = text;
  int base = 10;
  if (s.size() > 2 && s[0] == '0' && (s[1] == 'x' || s[1] == 'X')) base = 16, s.remove_prefix(2);
  else if (s.size() > 2 && s[0] == '0' && (s[1] == 'b' || s[1] == 'B')) base = 2, s.remove_prefix(2);
  Code c = 0;
  auto [p, ec] = std::from_chars(s.data(), s.data() + s.size(), c, base);
  if (s.empty() || ec != std::errc() || p != s.data() + s.size())
    throw usage_error(fmt::format("'{}' is not a code", text), where,
                      "write a code in hex (0x7e), binary (0b0111) or decimal (126)");
  if (!f.valid_code(c))
    throw usage_error(fmt::format("code {} is out of range", text), where,
                      fmt::format("{} has {} bits: codes 0 to {}", f.spec(), f.bits(),
                                  code_hex(f.code_count_minus_one(), f.bits())));
  return c;
}

void write_file_atomic(const std::string& path, const std::string& content) {
  const std::string tmp = path + ".lobit-partial";
  std::FILE* f = std::fopen(tmp.c_str(), "wb");
  if (!f) throw usage_error(fmt::format("cannot write {}: {}", tmp, std::strerror(errno)), path, "check the directory and its permissions");
  const bool ok = std::fwrite(content.data(), 1, content.size(), f) == content.size();
  const bool closed = std::fclose(f) == 0;
  if (!ok || !closed || std::rename(tmp.c_str(), path.c_str()) != 0) {
    const std::string why = std::strerror(errno);
    std::remove(tmp.c_str());
    throw usage_error(fmt::format("cannot write {}: {}", path, why), path, "check the disk and the path");
  }
}

void print_json(const nlohmann::json& j) {
  std::string s = j.dump(2);
  std::fwrite(s.data(), 1, s.size(), stdout);
  std::fputc('\n', stdout);
}

}  // namespace lobit::cli
