# safetensors and NumPy readers and writers (include/lobit/io/{safetensors,numpy}.hpp).
# Included from tests/CMakeLists.txt. The .npz fixtures are written at test time by
# tests/io/make_fixtures.py (python3 standard library only: struct and zipfile).
find_package(Python3 REQUIRED COMPONENTS Interpreter)
lobit_test(io_safetensors_test SOURCES io/safetensors_test.cpp LABELS unit LIBS nlohmann_json::nlohmann_json)
lobit_test(io_numpy_test SOURCES io/numpy_test.cpp LABELS unit)
target_compile_definitions(io_numpy_test PRIVATE
  LOBIT_PYTHON="${Python3_EXECUTABLE}"
  LOBIT_NPZ_FIXTURES="${CMAKE_CURRENT_SOURCE_DIR}/io/make_fixtures.py")
