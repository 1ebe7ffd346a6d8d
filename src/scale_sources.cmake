set(LOBIT_SCALE_SOURCES
  ${CMAKE_SOURCE_DIR}/src/scale/scaled_format.cpp
  ${CMAKE_SOURCE_DIR}/src/scale/quantize.cpp
  ${CMAKE_SOURCE_DIR}/src/measure/metrics.cpp
  ${CMAKE_SOURCE_DIR}/src/measure/fused_kernels.cpp
  ${CMAKE_SOURCE_DIR}/src/measure/score.cpp)
