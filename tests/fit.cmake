# Distribution statistics and fits (lobit fit). Included from tests/CMakeLists.txt.
# fit_test: moments, exact median, channels, outliers, totals, threads, KS/AD against a
# direct Boost.Math computation, recovery of known distributions (unit);
# fit_stephens_test: Monte Carlo of the modified KS and AD statistics against Stephens
# (1974) Table 1A (reference).
lobit_test(measure_fit_test SOURCES measure/fit_test.cpp LABELS unit LIBS Boost::headers)
lobit_test(measure_fit_stephens_test SOURCES measure/fit_stephens_test.cpp LABELS reference LIBS Boost::headers)
