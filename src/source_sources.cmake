# Seeded synthetic sources (include/lobit/source). Included from the top-level
# CMakeLists.txt, which adds LOBIT_SOURCE_SOURCES to the lobit library.
set(LOBIT_SOURCE_SOURCES ${CMAKE_SOURCE_DIR}/src/source/synthetic.cpp)
# The kernels call std::sqrt inside vectorised loops; without errno handling GCC
# emits a vector square root instead of a libm call per element. Values are
# unchanged (sqrt is correctly rounded either way).
if(CMAKE_CXX_COMPILER_ID MATCHES "GNU|Clang")
  set_source_files_properties(${CMAKE_SOURCE_DIR}/src/source/synthetic.cpp PROPERTIES COMPILE_OPTIONS "-fno-math-errno")
endif()
