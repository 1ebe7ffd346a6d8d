# Checkpoint I/O: the reader-independent core. Included from tests/CMakeLists.txt.
lobit_test(io_core_test SOURCES io/core_test.cpp LABELS unit)
