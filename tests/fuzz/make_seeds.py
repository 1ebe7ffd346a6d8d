#!/usr/bin/env python3
"""Small valid checkpoint files to start the fuzzers from (Python standard library only).

Usage: make_seeds.py OUT_DIR  ->  OUT_DIR/{safetensors,npy,npz,onnx}/*
"""
import io
import json
import os
import struct
import sys
import zipfile

out = sys.argv[1]


def put(kind, name, data):
    os.makedirs(os.path.join(out, kind), exist_ok=True)
    with open(os.path.join(out, kind, name), "wb") as f:
        f.write(data)


# safetensors: u64 header length, JSON header, data.
def safetensors(tensors):
    header, blob = {}, b""
    for name, dtype, shape, data in tensors:
        header[name] = {"dtype": dtype, "shape": shape, "data_offsets": [len(blob), len(blob) + len(data)]}
        blob += data
    h = json.dumps(header).encode()
    h += b" " * (-len(h) % 8)
    return struct.pack("<Q", len(h)) + h + blob


put("safetensors", "two.safetensors", safetensors([
    ("a", "F32", [2, 3], struct.pack("<6f", 1, -2, 3.5, 0, 1e-3, 7)),
    ("b", "BF16", [4], struct.pack("<4H", 0x3F80, 0xBF80, 0x7F80, 0x0001)),
    ("c", "F8_E4M3", [2, 2], bytes([0x00, 0x7E, 0x80, 0xFF])),
]))
put("safetensors", "f16.safetensors", safetensors([("w", "F16", [1, 2], struct.pack("<2H", 0x3C00, 0x8001))]))


def npy(descr, shape, data, version=(1, 0), fortran=False):
    d = "{'descr': '%s', 'fortran_order': %s, 'shape': %s, }" % (
        descr, "True" if fortran else "False", "(" + "".join("%d, " % s for s in shape).rstrip(" ") + ")")
    lenfmt = "<H" if version[0] == 1 else "<I"
    pre = 6 + 2 + struct.calcsize(lenfmt)
    pad = -(pre + len(d) + 1) % 64
    hdr = (d + " " * pad + "\n").encode()
    return b"\x93NUMPY" + bytes(version) + struct.pack(lenfmt, len(hdr)) + hdr + data


put("npy", "f4.npy", npy("<f4", (2, 2), struct.pack("<4f", 1, 2, 3, 4)))
put("npy", "f8be_v2.npy", npy(">f8", (3,), struct.pack(">3d", 1, -1, 0.5), version=(2, 0)))
put("npy", "i2_fortran.npy", npy("<i2", (2, 3), struct.pack("<6h", 1, 2, 3, 4, 5, 6), fortran=True))

buf = io.BytesIO()
with zipfile.ZipFile(buf, "w") as z:
    z.writestr(zipfile.ZipInfo("a.npy"), npy("<f4", (3,), struct.pack("<3f", 1, 2, 3)))
    z.writestr("b.npy", npy("<f2", (2,), struct.pack("<2H", 0x3C00, 0x4000)), compress_type=zipfile.ZIP_DEFLATED)
put("npz", "two.npz", buf.getvalue())


# ONNX: a hand-encoded ModelProto with one initializer and one Constant node.
def varint(v):
    b = b""
    while True:
        x = v & 0x7F
        v >>= 7
        if v:
            b += bytes([x | 0x80])
        else:
            return b + bytes([x])


def field(num, wire, payload):
    key = varint(num << 3 | wire)
    if wire == 0:
        return key + varint(payload)
    return key + varint(len(payload)) + payload


def tensor(name, dims, raw, dtype=1):
    return (b"".join(field(1, 0, d) for d in dims) + field(2, 0, dtype) + field(8, 2, name.encode())
            + field(9, 2, raw))


init = tensor("w", [2, 2], struct.pack("<4f", 1, 2, 3, 4))
const = field(5, 2, field(1, 2, b"value") + field(5, 2, tensor("c", [3], struct.pack("<3f", 5, 6, 7)))
                   + field(20, 0, 4))
node = field(2, 2, b"c") + field(4, 2, b"Constant") + const
mm = field(1, 2, b"x") + field(1, 2, b"w") + field(2, 2, b"y") + field(4, 2, b"MatMul")
graph = field(1, 2, node) + field(1, 2, mm) + field(2, 2, b"g") + field(5, 2, init)
put("onnx", "small.onnx", field(1, 0, 8) + field(7, 2, graph))
