# Writes version.cpp with the project version and the current git revision.
# Runs at every build so the revision is never stale.
# Usage: cmake -DSRC=dir -DOUT=file -DVERSION=x.y.z -P gen_version.cmake
execute_process(COMMAND git -C ${SRC} rev-parse --short=12 HEAD
                OUTPUT_VARIABLE rev OUTPUT_STRIP_TRAILING_WHITESPACE ERROR_QUIET RESULT_VARIABLE rc)
if(NOT rc EQUAL 0 OR NOT rev)
  set(rev "unknown")
else()
  execute_process(COMMAND git -C ${SRC} status --porcelain --untracked-files=no
                  OUTPUT_VARIABLE dirty OUTPUT_STRIP_TRAILING_WHITESPACE ERROR_QUIET)
  if(dirty)
    set(rev "${rev}-dirty")
  endif()
endif()
set(text "#include \"lobit/version.hpp\"\nnamespace lobit {\nstd::string_view version() { return \"${VERSION}\"; }\nstd::string_view git_revision() { return \"${rev}\"; }\n}  // namespace lobit\n")
file(WRITE "${OUT}.tmp" "${text}")
file(COPY_FILE "${OUT}.tmp" "${OUT}" ONLY_IF_DIFFERENT)
file(REMOVE "${OUT}.tmp")
