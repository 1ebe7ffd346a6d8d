# Seeded synthetic sources. Included from tests/CMakeLists.txt.
lobit_test(source_synthetic_test SOURCES source/synthetic_test.cpp LABELS unit LIBS Boost::headers)
