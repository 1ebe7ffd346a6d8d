lobit_test(scale_scaled_format_test SOURCES scale/scaled_format_test.cpp LABELS unit)
