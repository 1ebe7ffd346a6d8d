# ONNX model reader (a protobuf wire-format walker of its own). Included from the
# top-level CMakeLists.txt, which adds LOBIT_IO_ONNX_SOURCES to the lobit_io library.
set(LOBIT_IO_ONNX_SOURCES
  ${CMAKE_SOURCE_DIR}/src/io/onnx.cpp
  ${CMAKE_SOURCE_DIR}/src/io/protobuf_wire.cpp)
