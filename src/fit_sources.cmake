# Distribution statistics and fits (`lobit fit`). Included from the top-level
# CMakeLists.txt: the library part goes into `lobit` (Boost.Math, header-only),
# the command into the `lobit` binary.
set(LOBIT_FIT_SOURCES
  ${CMAKE_SOURCE_DIR}/src/measure/fit.cpp
  ${CMAKE_SOURCE_DIR}/src/measure/fit_models.cpp)
set(LOBIT_CLI_EXTRA_SOURCES ${LOBIT_CLI_EXTRA_SOURCES} ${CMAKE_SOURCE_DIR}/tools/lobit/cmd_fit.cpp)
