# Kernel code generation (`lobit lut`): lookup tables, exact encoders and bit packing as C/C++/CUDA headers.
set(LOBIT_EMIT_SOURCES ${CMAKE_SOURCE_DIR}/src/emit/lut.cpp)
set(LOBIT_LUT_CLI_SOURCES ${CMAKE_SOURCE_DIR}/tools/lobit/cmd_lut.cpp)
