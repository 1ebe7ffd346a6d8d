# The exact-error and Lloyd-Max modules (included from the top-level CMakeLists.txt).
set(LOBIT_MEASURE_DESIGN_SOURCES
  ${CMAKE_SOURCE_DIR}/src/measure/exact_error.cpp
  ${CMAKE_SOURCE_DIR}/src/design/lloyd_max.cpp)
