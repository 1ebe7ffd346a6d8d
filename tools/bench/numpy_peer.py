#!/usr/bin/env python3
"""The peer a user would write instead of lobit: a vectorised NumPy
fake-quantisation of FP4 (E2M1) elements in blocks of 32 with a shared
power-of-two scale (the OCP MX rule), scored by MSE, on 16M Gaussian samples.
Prints the MSE and the throughput of quantisation + scoring (samples already in
memory), for comparison with `lobit_score_bench` (benchmark only; not a test).
Usage: python3 tools/bench/numpy_peer.py [samples]"""
import sys
import time

import numpy as np

n = int(sys.argv[1]) if len(sys.argv) > 1 else 1 << 24
x = np.random.default_rng(1).standard_normal(n, dtype=np.float32)

# E2M1 magnitudes and the midpoints between them; ties go to the even code.
levels = np.array([0, 0.5, 1, 1.5, 2, 3, 4, 6], dtype=np.float64)
mids = (levels[1:] + levels[:-1]) / 2
even_up = np.array([(i + 1) % 2 == 0 for i in range(7)])  # tie goes up when the upper code is even


def fake_quant(v):
    b = v.reshape(-1, 32).astype(np.float64)
    amax = np.abs(b).max(axis=1, keepdims=True)
    _, e = np.frexp(amax)  # amax = m * 2^e, m in [0.5, 1): floor(log2 amax) = e - 1
    shared = np.where(amax > 0, e - 1 - 2, -127).clip(-127, 127)
    s = np.ldexp(1.0, shared)
    y = np.abs(b) / s
    idx = np.searchsorted(mids, y, side="left")  # number of midpoints < y
    tie = (idx < 7) & (y == mids[np.minimum(idx, 6)]) & even_up[np.minimum(idx, 6)]
    idx = np.minimum(idx + tie, 7)
    return (np.sign(b) * levels[idx] * s).reshape(-1)


t0 = time.perf_counter()
q = fake_quant(x)
mse = float(np.mean((q - x.astype(np.float64)) ** 2))
dt = time.perf_counter() - t0
print(f"numpy e2m1@32:e8m0: mse {mse:.6g}, {n / dt / 1e6:.1f} M elements/s ({dt * 1e3:.0f} ms for {n} samples)")
