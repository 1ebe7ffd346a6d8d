# The exact-error and Lloyd-Max suites (included from tests/CMakeLists.txt).
# exact_error: closed forms, Monte Carlo and common-practice rules (unit);
# lloyd_max: the published tables of Max 1960 and Paez & Glisson 1972 (reference).
lobit_test(measure_exact_error_test SOURCES measure/exact_error_test.cpp LABELS unit)
lobit_test(design_lloyd_max_test SOURCES design/lloyd_max_test.cpp LABELS reference)
