// lobit: a lab for designing and choosing low-bit number formats.
#include <CLI/CLI.hpp>
#include <cstdio>
#include <fmt/format.h>

#include "common.hpp"
#include "lobit/error.hpp"
#include "lobit/version.hpp"

int main(int argc, char** argv) {
  CLI::App app{"lobit: exact code points, rounding and error of low-bit number formats.\n"
               "Formats are written as PRESET or FAMILY with +key=value parts, e.g. e4m3, fp16+subnormals=no,\n"
               "float+exp=3+man=4+bias=5+special=none, int+bits=4+range=symmetric, codebook+values=-1/0/0.5/1.\n"
               "`lobit formats` lists the presets; README.md documents every key.",
               "lobit"};
  app.set_version_flag("--version", fmt::format("lobit {} (git {})", lobit::version(), lobit::git_revision()));
  app.require_subcommand(1);
  lobit::cli::add_formats_command(app);
  lobit::cli::add_inspect_command(app);
  lobit::cli::add_encode_command(app);
  lobit::cli::add_decode_command(app);
  lobit::cli::add_compare_command(app);
  lobit::cli::add_score_command(app);
  lobit::cli::add_design_command(app);
  lobit::cli::add_lut_command(app);
  lobit::cli::add_quantize_command(app);
  lobit::cli::add_fit_command(app);
  try {
    app.parse(argc, argv);
  } catch (const CLI::CallForHelp& e) {
    return app.exit(e);
  } catch (const CLI::CallForAllHelp& e) {
    return app.exit(e);
  } catch (const CLI::CallForVersion& e) {
    return app.exit(e);
  } catch (const CLI::ParseError& e) {
    std::fprintf(stderr, "lobit: error: %s (see `lobit --help`)\n", e.what());
    return 2;
  } catch (const lobit::Error& e) {
    std::fflush(stdout);
    std::fprintf(stderr, "lobit: error: %s\n", e.message().c_str());
    return e.kind() == lobit::Error::Kind::usage ? 2 : 1;
  } catch (const std::exception& e) {
    std::fprintf(stderr, "lobit: internal error: %s\n", e.what());
    return 1;
  }
  return 0;
}
