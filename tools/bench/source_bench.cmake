# Sample generation throughput of the synthetic sources. Included from
# tools/bench/CMakeLists.txt (find_package(benchmark) is done at the top level).
add_executable(lobit_source_bench ${CMAKE_CURRENT_LIST_DIR}/source_bench.cpp)
target_link_libraries(lobit_source_bench PRIVATE lobit benchmark::benchmark)
