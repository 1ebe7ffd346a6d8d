#pragma once
// The one error type of lobit: what went wrong, where, and how to fix it.
#include <stdexcept>
#include <string>

namespace lobit {

class Error : public std::runtime_error {
 public:
  enum class Kind {
    usage,    // bad argument or input: the CLI exits 2
    internal  // a bug or an environment failure: the CLI exits 1
  };

  Error(Kind kind, std::string what, std::string where = {}, std::string hint = {})
      : std::runtime_error(what), kind_(kind), where_(std::move(where)), hint_(std::move(hint)) {}

  Kind kind() const noexcept { return kind_; }
  const std::string& where() const noexcept { return where_; }
  const std::string& hint() const noexcept { return hint_; }

  // One line: "where: what (hint)".
  std::string message() const {
    std::string m;
    if (!where_.empty()) m += where_ + ": ";
    m += what();
    if (!hint_.empty()) m += " (" + hint_ + ")";
    return m;
  }

 private:
  Kind kind_;
  std::string where_;
  std::string hint_;
};

// Shorthand for the common case: bad user input.
inline Error usage_error(std::string what, std::string where = {}, std::string hint = {}) {
  return Error(Error::Kind::usage, std::move(what), std::move(where), std::move(hint));
}

}  // namespace lobit
