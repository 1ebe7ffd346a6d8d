# Checkpoint I/O: the reader-independent core. Included from tests/CMakeLists.txt.
lobit_test(io_core_test SOURCES io/core_test.cpp LABELS unit)

# The readers under AddressSanitizer and UBSan, and each reader's libFuzzer target for
# a bounded time (a separate clang build under the build folder; about 4 minutes).
option(LOBIT_FUZZ_TESTS "Run the sanitizer and fuzz build of the checkpoint readers in the suite" ON)
set(LOBIT_FUZZ_SECONDS 20 CACHE STRING "Seconds each reader's fuzzer runs in the suite")
if(LOBIT_FUZZ_TESTS)
  add_test(NAME io_fuzz_sanitized
           COMMAND bash ${CMAKE_SOURCE_DIR}/tests/fuzz/run.sh ${CMAKE_SOURCE_DIR} ${CMAKE_BINARY_DIR}/fuzz
                   ${LOBIT_FUZZ_SECONDS})
  set_tests_properties(io_fuzz_sanitized PROPERTIES LABELS fuzz TIMEOUT 1800)
endif()

# score / quantize end to end on the real models (fetched by tools/scripts/fetch-test-models.sh;
# skipped when they are absent).
# LOBIT_MODEL_CACHE and Python3: set in tests/CMakeLists.txt.
if(Python3_Interpreter_FOUND)
  add_test(NAME checkpoint_cli_test
           COMMAND ${Python3_EXECUTABLE} ${CMAKE_SOURCE_DIR}/tests/cli/checkpoint_test.py $<TARGET_FILE:lobit_cli>
                   ${LOBIT_MODEL_CACHE})
  set_tests_properties(checkpoint_cli_test PROPERTIES LABELS cli SKIP_RETURN_CODE 77)
endif()
