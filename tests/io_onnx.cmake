# ONNX reader: synthetic models (io_onnx_test) and the real models fetched by
# tools/scripts/fetch-test-models.sh, compared with an independent Python reader
# (io_onnx_real_models_test; skipped, exit code 77, when the model folder is absent).
# Included from tests/CMakeLists.txt.
lobit_test(io_onnx_test SOURCES io/onnx_test.cpp LABELS unit)

# LOBIT_MODEL_CACHE and Python3: set in tests/CMakeLists.txt.
if(Python3_Interpreter_FOUND)
  lobit_test(io_onnx_real_models_test SOURCES io/onnx_real_models_test.cpp LABELS unit
             LIBS nlohmann_json::nlohmann_json)
  set_tests_properties(io_onnx_real_models_test PROPERTIES
    ENVIRONMENT "LOBIT_MODEL_CACHE=${LOBIT_MODEL_CACHE};LOBIT_PYTHON=${Python3_EXECUTABLE};LOBIT_ONNX_REFERENCE=${CMAKE_CURRENT_SOURCE_DIR}/io/onnx_reference.py"
    SKIP_RETURN_CODE 77
    TIMEOUT 300)
else()
  message(STATUS "python3 not found: io_onnx_real_models_test is not built")
endif()
