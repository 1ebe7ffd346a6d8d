# Kernel code generation: the generated headers are compiled with the system compilers and run.
include(CheckLanguage)
check_language(C)
set(LOBIT_TEST_C_COMPILER "${CMAKE_C_COMPILER}")
if(NOT LOBIT_TEST_C_COMPILER)
  find_program(LOBIT_TEST_C_COMPILER NAMES cc gcc clang)
endif()
option(LOBIT_EMIT_NVCC "Compile the generated CUDA headers with nvcc in the tests where nvcc exists" ON)
set(LOBIT_TEST_NVCC "")
if(LOBIT_EMIT_NVCC)
  find_program(LOBIT_NVCC nvcc PATHS /usr/local/cuda/bin)
  if(LOBIT_NVCC AND EXISTS "${LOBIT_NVCC}")
    set(LOBIT_TEST_NVCC "${LOBIT_NVCC}")
  endif()
endif()
set(LOBIT_EMIT_TEST_DIR ${CMAKE_CURRENT_BINARY_DIR}/emit_work)

lobit_test(emit_lut_test SOURCES emit/lut_test.cpp LABELS unit LIBS ${CMAKE_DL_LIBS})
target_compile_definitions(emit_lut_test PRIVATE
  LOBIT_TEST_C_COMPILER="${LOBIT_TEST_C_COMPILER}" LOBIT_TEST_CXX_COMPILER="${CMAKE_CXX_COMPILER}"
  LOBIT_EMIT_TEST_DIR="${LOBIT_EMIT_TEST_DIR}")

lobit_test(emit_lut_cuda_test SOURCES emit/lut_cuda_test.cpp LABELS unit LIBS ${CMAKE_DL_LIBS})
target_compile_definitions(emit_lut_cuda_test PRIVATE
  LOBIT_TEST_CXX_COMPILER="${CMAKE_CXX_COMPILER}" LOBIT_TEST_NVCC="${LOBIT_TEST_NVCC}"
  LOBIT_EMIT_TEST_DIR="${LOBIT_EMIT_TEST_DIR}")
if(NOT LOBIT_TEST_NVCC)
  message(STATUS "nvcc not found (or LOBIT_EMIT_NVCC=OFF): emit_lut_cuda_test checks the CUDA header as host C++ only")
endif()

lobit_test(emit_lut_block_test SOURCES emit/lut_block_test.cpp LABELS unit LIBS ${CMAKE_DL_LIBS})
target_compile_definitions(emit_lut_block_test PRIVATE
  LOBIT_TEST_C_COMPILER="${LOBIT_TEST_C_COMPILER}" LOBIT_TEST_CXX_COMPILER="${CMAKE_CXX_COMPILER}"
  LOBIT_EMIT_TEST_DIR="${LOBIT_EMIT_TEST_DIR}")

lobit_test(emit_lut_product_test SOURCES emit/lut_product_test.cpp LABELS unit LIBS ${CMAKE_DL_LIBS})
target_link_libraries(emit_lut_product_test PRIVATE nlohmann_json::nlohmann_json)
target_compile_definitions(emit_lut_product_test PRIVATE
  LOBIT_TEST_C_COMPILER="${LOBIT_TEST_C_COMPILER}" LOBIT_TEST_CXX_COMPILER="${CMAKE_CXX_COMPILER}"
  LOBIT_EMIT_TEST_DIR="${LOBIT_EMIT_TEST_DIR}")

foreach(t stochastic scaled_int)
  lobit_test(emit_lut_${t}_test SOURCES emit/lut_${t}_test.cpp LABELS unit LIBS ${CMAKE_DL_LIBS})
  target_compile_definitions(emit_lut_${t}_test PRIVATE
    LOBIT_TEST_C_COMPILER="${LOBIT_TEST_C_COMPILER}" LOBIT_TEST_CXX_COMPILER="${CMAKE_CXX_COMPILER}"
    LOBIT_EMIT_TEST_DIR="${LOBIT_EMIT_TEST_DIR}")
endforeach()
