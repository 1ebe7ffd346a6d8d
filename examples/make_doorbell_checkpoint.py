#!/usr/bin/env python3
"""Writes the demo checkpoint: invented weights of a small wake-word detector for a
battery-powered doorbell (two convolutions, a recurrent layer, a classifier), as a
safetensors file. Python standard library only; seeded, so every run writes the same
bytes. The numbers are made up for the demo and describe no real network.

Usage: make_doorbell_checkpoint.py OUT.safetensors
"""
import json
import math
import random
import struct
import sys

rng = random.Random(20261201)


def conv(out_ch, in_ch, k, spread):
    # Per-output-channel scales spread log-normally: uneven channels.
    vals = []
    for _ in range(out_ch):
        s = 0.05 * math.exp(rng.gauss(0, spread))
        vals += [rng.gauss(0, s) for _ in range(in_ch * k * k)]
    return vals


def linear(out_f, in_f, outliers):
    vals = [rng.gauss(0, 1 / math.sqrt(in_f)) for _ in range(out_f * in_f)]
    for _ in range(outliers):  # a few large coordinates, as trained recurrent weights show
        vals[rng.randrange(len(vals))] = rng.choice([-1, 1]) * 40 / math.sqrt(in_f)
    return vals


def laplace(n, b):
    return [rng.choice([-1, 1]) * rng.expovariate(1 / b) for _ in range(n)]


tensors = [
    ("frontend.conv1.weight", [32, 1, 5, 5], conv(32, 1, 5, 0.8)),
    ("frontend.conv1.bias", [32], [rng.gauss(0, 0.01) for _ in range(32)]),
    ("frontend.conv2.weight", [64, 32, 3, 3], conv(64, 32, 3, 0.5)),
    ("recurrent.weight_ih", [384, 64], linear(384, 64, 6)),
    ("recurrent.weight_hh", [384, 128], linear(384, 128, 3)),
    ("classifier.weight", [4, 128], laplace(4 * 128, 0.08)),
]
header, blob = {"__metadata__": {"scenario": "invented demo weights of a doorbell wake-word detector"}}, b""
for name, shape, vals in tensors:
    data = struct.pack("<%df" % len(vals), *vals)
    header[name] = {"dtype": "F32", "shape": shape, "data_offsets": [len(blob), len(blob) + len(data)]}
    blob += data
h = json.dumps(header).encode()
h += b" " * (-len(h) % 8)
with open(sys.argv[1], "wb") as f:
    f.write(struct.pack("<Q", len(h)) + h + blob)
