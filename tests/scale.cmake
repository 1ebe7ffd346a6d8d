lobit_test(scale_scaled_format_test SOURCES scale/scaled_format_test.cpp LABELS unit)
lobit_test(measure_score_test SOURCES measure/score_test.cpp LABELS reference)
lobit_test(scale_fused_kernels_test SOURCES scale/fused_kernels_test.cpp LABELS unit)
