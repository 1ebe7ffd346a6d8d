#pragma once
// Helpers shared by the reader tests: a private temporary folder and whole-file writes.
#include <doctest/doctest.h>
#include <stdlib.h>

#include <filesystem>
#include <fstream>
#include <string>

namespace lobit::test {

struct TempDir {
  std::filesystem::path path;
  explicit TempDir(const std::string& stem = "lobit-io-test") {
    std::string t = (std::filesystem::temp_directory_path() / (stem + "-XXXXXX")).string();
    REQUIRE(::mkdtemp(t.data()) != nullptr);
    path = t;
  }
  ~TempDir() {
    std::error_code ec;
    std::filesystem::remove_all(path, ec);
  }
  std::string file(const std::string& name) const { return (path / name).string(); }
};

inline void write_file(const std::string& path, const std::string& bytes) {
  std::ofstream f(path, std::ios::binary);
  f.write(bytes.data(), static_cast<std::streamsize>(bytes.size()));
  REQUIRE(f.good());
}

}  // namespace lobit::test
