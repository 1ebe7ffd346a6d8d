# Seeded synthetic sources (include/lobit/source). Included from the top-level
# CMakeLists.txt, which adds LOBIT_SOURCE_SOURCES to the lobit library.
set(LOBIT_SOURCE_SOURCES ${CMAKE_SOURCE_DIR}/src/source/synthetic.cpp)
# The sample kernels must vectorise. Two flags that change no value:
#   -fno-math-errno     std::sqrt becomes a vector square root instead of a libm
#                       call per element (sqrt is correctly rounded either way);
#   -fno-trapping-math  selects between computed doubles (c ? a : b) become vector
#                       blends instead of branches; only the floating-point
#                       exception flags, which lobit never reads, are affected.
# No fast-math: no reassociation, no contraction (-ffp-contract=off stays), no
# finite-math or signed-zero assumptions.
if(CMAKE_CXX_COMPILER_ID MATCHES "GNU|Clang")
  set_source_files_properties(${CMAKE_SOURCE_DIR}/src/source/synthetic.cpp
    PROPERTIES COMPILE_OPTIONS "-fno-math-errno;-fno-trapping-math")
endif()
