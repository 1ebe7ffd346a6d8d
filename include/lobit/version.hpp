#pragma once
#include <string_view>
namespace lobit {
std::string_view version();       // e.g. "0.1.0"
std::string_view git_revision();  // short hash of the commit the library was built from
}  // namespace lobit
