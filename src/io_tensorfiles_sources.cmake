# safetensors and NumPy (.npy / .npz) readers and writers. Included from the top-level
# CMakeLists.txt, which adds them to the lobit_io library (nlohmann-json and libzip).
set(LOBIT_IO_TENSORFILES_SOURCES
  ${CMAKE_SOURCE_DIR}/src/io/safetensors.cpp
  ${CMAKE_SOURCE_DIR}/src/io/numpy.cpp
  ${CMAKE_SOURCE_DIR}/src/io/npz.cpp)
