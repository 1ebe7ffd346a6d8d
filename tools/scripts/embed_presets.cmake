# Writes a C++ source holding the text of every preset TOML file, so the
# library carries its presets with it (formats/ stays the one source of truth).
# Usage: cmake -DOUT=file.cpp -DDIR=formats -P embed_presets.cmake
file(GLOB FILES "${DIR}/*.toml")
list(SORT FILES)
set(body "// Generated from formats/*.toml by tools/scripts/embed_presets.cmake. Do not edit.\n")
string(APPEND body "#include <cstddef>\nnamespace lobit {\nstruct EmbeddedFile { const char* name; const char* text; };\n")
string(APPEND body "extern const EmbeddedFile embedded_presets[] = {\n")
set(count 0)
foreach(f IN LISTS FILES)
  file(READ "${f}" text)
  get_filename_component(name "${f}" NAME)
  string(APPEND body "  {\"formats/${name}\", R\"lobit_toml(${text})lobit_toml\"},\n")
  math(EXPR count "${count} + 1")
endforeach()
string(APPEND body "};\nextern const std::size_t embedded_preset_count = ${count};\n}  // namespace lobit\n")
file(WRITE "${OUT}.tmp" "${body}")
file(COPY_FILE "${OUT}.tmp" "${OUT}" ONLY_IF_DIFFERENT)
file(REMOVE "${OUT}.tmp")
