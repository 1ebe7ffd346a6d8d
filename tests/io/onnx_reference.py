#!/usr/bin/env python3
"""Independent reference reader for the ONNX weight reader's tests (python3 stdlib only).

Usage: onnx_reference.py MODEL.onnx  -> JSON on stdout:
  {"model": path, "tensors": [{"name", "raw_name", "where", "dtype", "dims", "count", "floating",
                               "first": [hex...], "last": hex|null, "sum", "abs_sum",
                               "consumers": ["Op:input index", ...]}...],
   "total_elements": N, "floating_elements": N}

Written apart from the C++ reader (src/io/onnx.cpp) on purpose: it decodes the
protobuf wire format its own way (the whole file as one memoryview, recursion over
messages) so that the two can be compared. Field numbers from onnx.proto, from memory:
  ModelProto.graph = 7
  GraphProto: node = 1, initializer = 5, input = 11, sparse_initializer = 15
  NodeProto: input = 1, output = 2, name = 3, op_type = 4, attribute = 5, domain = 7
  AttributeProto: name = 1, t = 5, g = 6, tensors = 10, graphs = 11
  TensorProto: dims = 1, data_type = 2, float_data = 4, int32_data = 5, int64_data = 7,
               name = 8, raw_data = 9, double_data = 10, uint64_data = 11,
               external_data = 13 (key = 1, value = 2), data_location = 14

Weights: graph initializers and the "value" tensor of Constant nodes, in file order,
descending into the subgraphs of a node (attributes g and graphs) after the node.
Naming rule (the same one the C++ reader documents, implemented here from its text):
a name seen for the first time is kept; a later tensor of the same name is called
"<subgraph path>/<name>", the path made of one "<node>/<attribute>" step per subgraph
level ("<node>" the node name, or "<op_type>#<index in its graph>" when unnamed;
"<attribute>[k]" for the k-th graph of a `graphs` list); when that is taken too,
"~2", "~3", ... is appended.

"consumers" lists the standard-domain nodes that take the tensor's name as an input,
anywhere in the model (by name alone: enough for models whose weight names are unique).

Values: "first" holds the bit patterns of the first 4 elements and "last" that of the
last one, as lower-case hex of the element's width; "sum" and "abs_sum" are float64
sums of the decoded values in storage order, written as hex floats (float.hex).
"""
import json
import math
import mmap
import os
import struct
import sys


class Corrupt(Exception):
    pass


# TensorProto.DataType -> (name, bytes, kind); kind: 'f' float, 'i' signed, 'u' unsigned.
DTYPES = {
    1: ("float32", 4, "f"),
    2: ("uint8", 1, "u"),
    3: ("int8", 1, "i"),
    4: ("uint16", 2, "u"),
    5: ("int16", 2, "i"),
    6: ("int32", 4, "i"),
    7: ("int64", 8, "i"),
    9: ("bool", 1, "u"),
    10: ("float16", 2, "f"),
    11: ("float64", 8, "f"),
    12: ("uint32", 4, "u"),
    13: ("uint64", 8, "u"),
    16: ("bfloat16", 2, "f"),
    17: ("e4m3", 1, "f"),
    18: ("e4m3 bias 8", 1, "f"),
    19: ("e5m2", 1, "f"),
    20: ("e5m2 bias 16", 1, "f"),
}


def varint(buf, pos, end):
    """Returns (value, next position) of the base-128 varint at pos."""
    result = 0
    shift = 0
    while True:
        if pos >= end:
            raise Corrupt("varint runs past its message")
        b = buf[pos]
        pos += 1
        result |= (b & 0x7F) << shift
        if b < 0x80:
            return result, pos
        shift += 7
        if shift >= 70:
            raise Corrupt("varint longer than 10 bytes")


def fields(buf, start, end):
    """Yields (number, wire_type, value) over a message; value is an int for
    varint/fixed types and a (start, end) pair for length-delimited ones."""
    pos = start
    while pos < end:
        key, pos = varint(buf, pos, end)
        number, wt = key >> 3, key & 7
        if wt == 0:
            value, pos = varint(buf, pos, end)
        elif wt == 1:
            if pos + 8 > end:
                raise Corrupt("fixed64 past the end")
            value = int.from_bytes(buf[pos:pos + 8], "little")
            pos += 8
        elif wt == 5:
            if pos + 4 > end:
                raise Corrupt("fixed32 past the end")
            value = int.from_bytes(buf[pos:pos + 4], "little")
            pos += 4
        elif wt == 2:
            n, pos = varint(buf, pos, end)
            if pos + n > end:
                raise Corrupt("length past the end")
            value = (pos, pos + n)
            pos += n
        else:
            raise Corrupt("wire type %d" % wt)
        yield number, wt, value


def text(buf, span):
    return bytes(buf[span[0]:span[1]]).decode("utf-8", "replace")


def varints_in(buf, span):
    out = []
    pos, end = span
    while pos < end:
        v, pos = varint(buf, pos, end)
        out.append(v)
    return out


def signed64(v):
    v &= (1 << 64) - 1
    return v - (1 << 64) if v >= (1 << 63) else v


def decode_minifloat(bits, exp_bits, man_bits, bias, kind):
    """kind: 'ieee' (E5M2: inf and NaN at the top exponent), 'ocp_e4m3' (only
    S.1111.111 is NaN, no infinities), 'nz' (0x80 is the only NaN, no negative zero)."""
    sign = -1.0 if bits & 0x80 else 1.0
    e = (bits >> man_bits) & ((1 << exp_bits) - 1)
    m = bits & ((1 << man_bits) - 1)
    if kind == "nz" and bits == 0x80:
        return math.nan
    if kind == "ocp_e4m3" and (bits & 0x7F) == 0x7F:
        return math.nan
    if kind == "ieee" and e == (1 << exp_bits) - 1:
        return sign * math.inf if m == 0 else math.nan
    if e == 0:
        return sign * m * 2.0 ** (1 - bias - man_bits)
    return sign * (1 + m / (1 << man_bits)) * 2.0 ** (e - bias)


def value_of(dtype, bits):
    """The number an element's bit pattern stands for."""
    name, size, kind = DTYPES[dtype]
    if dtype == 1:
        return struct.unpack("<f", bits.to_bytes(4, "little"))[0]
    if dtype == 11:
        return struct.unpack("<d", bits.to_bytes(8, "little"))[0]
    if dtype == 10:
        return struct.unpack("<e", bits.to_bytes(2, "little"))[0]
    if dtype == 16:
        return struct.unpack("<f", (bits << 16).to_bytes(4, "little"))[0]
    if dtype == 17:
        return decode_minifloat(bits, 4, 3, 7, "ocp_e4m3")   # OCP OFP8 spec, E4M3
    if dtype == 18:
        return decode_minifloat(bits, 4, 3, 8, "nz")
    if dtype == 19:
        return decode_minifloat(bits, 5, 2, 15, "ieee")      # OCP OFP8 spec, E5M2
    if dtype == 20:
        return decode_minifloat(bits, 5, 2, 16, "nz")
    if kind == "i" and bits >= 1 << (8 * size - 1):
        return float(bits - (1 << (8 * size)))
    return float(bits)


class Tensor:
    def __init__(self):
        self.dims = []
        self.dtype = 0
        self.name = ""
        self.raw = None
        self.typed = {}        # field number -> list of element bit patterns
        self.external = {}
        self.location = 0


def parse_tensor(buf, span):
    t = Tensor()
    for num, wt, val in fields(buf, *span):
        if num == 1:
            t.dims += varints_in(buf, val) if wt == 2 else [val]
        elif num == 2:
            t.dtype = val
        elif num == 8:
            t.name = text(buf, val)
        elif num == 9:
            t.raw = val
        elif num == 13:
            key = value = ""
            for n2, _, v2 in fields(buf, *val):
                if n2 == 1:
                    key = text(buf, v2)
                elif n2 == 2:
                    value = text(buf, v2)
            t.external[key] = value
        elif num == 14:
            t.location = val
        elif num in (4, 10):  # float_data (fixed32), double_data (fixed64)
            width = 4 if num == 4 else 8
            lst = t.typed.setdefault(num, [])
            if wt == 2:
                raw = bytes(buf[val[0]:val[1]])
                lst += [int.from_bytes(raw[k:k + width], "little") for k in range(0, len(raw), width)]
            else:
                lst.append(val)
        elif num in (5, 7, 11):  # int32_data, int64_data, uint64_data (varints)
            lst = t.typed.setdefault(num, [])
            lst += varints_in(buf, val) if wt == 2 else [val]
    return t


def element_bits(t, model_dir, buf):
    """All elements' bit patterns, in storage order."""
    name, size, kind = DTYPES[t.dtype]
    count = math.prod(t.dims)
    if t.location == 1:
        location = t.external["location"]
        path = os.path.join(model_dir, location)
        offset = int(t.external.get("offset", "0"))
        length = int(t.external.get("length", str(count * size)))
        with open(path, "rb") as f:
            f.seek(offset)
            data = f.read(length)
        return [int.from_bytes(data[k:k + size], "little") for k in range(0, len(data), size)]
    if t.raw is not None:
        data = bytes(buf[t.raw[0]:t.raw[1]])
        return [int.from_bytes(data[k:k + size], "little") for k in range(0, len(data), size)]
    for num, values in t.typed.items():
        mask = (1 << (8 * size)) - 1
        if num == 7:
            return [signed64(v) & mask for v in values]
        return [v & mask for v in values]
    return []


class Walker:
    def __init__(self, path):
        self.path = path
        self.dir = os.path.dirname(os.path.abspath(path))
        self.taken = set()
        self.out = []
        self.uses = {}   # value name -> ["Op:input index", ...] over every graph

    def add(self, t, raw_name, steps, where):
        name = raw_name
        if name in self.taken:
            name = "/".join(steps + [raw_name])
            base, k = name, 2
            while name in self.taken:
                name = "%s~%d" % (base, k)
                k += 1
        self.taken.add(name)
        if t.dtype not in DTYPES:
            raise Corrupt("tensor %r has data_type %d" % (raw_name, t.dtype))
        bits = element_bits(t, self.dir, self.buf)
        count = math.prod(t.dims)
        if len(bits) != count:
            raise Corrupt("tensor %r: %d elements for dims %r" % (raw_name, len(bits), t.dims))
        total = 0.0
        abs_total = 0.0
        for b in bits:
            v = value_of(t.dtype, b)
            total += v
            abs_total += abs(v)
        width = 2 * DTYPES[t.dtype][1]
        self.out.append({
            "name": name,
            "raw_name": raw_name,
            "where": where,
            "dtype": t.dtype,
            "dims": t.dims,
            "count": count,
            "floating": DTYPES[t.dtype][2] == "f",
            "first": ["%0*x" % (width, b) for b in bits[:4]],
            "last": ("%0*x" % (width, bits[-1])) if bits else None,
            "sum": float.hex(total),
            "abs_sum": float.hex(abs_total),
        })

    def graph(self, span, steps, where):
        index = 0
        for num, wt, val in fields(self.buf, *span):
            if num == 5:
                t = parse_tensor(self.buf, val)
                self.add(t, t.name, steps, "initializer" + where)
            elif num == 15:
                raise Corrupt("sparse initializer")
            elif num == 1:
                self.node(val, index, steps, where)
                index += 1

    def node(self, span, index, steps, where):
        inputs, outputs, name, op, domain, attrs = [], [], "", "", "", []
        for num, wt, val in fields(self.buf, *span):
            if num == 1:
                inputs.append(text(self.buf, val))
            elif num == 2:
                outputs.append(text(self.buf, val))
            elif num == 3:
                name = text(self.buf, val)
            elif num == 4:
                op = text(self.buf, val)
            elif num == 7:
                domain = text(self.buf, val)
            elif num == 5:
                attrs.append(val)
        label = name if name else "%s#%d" % (op, index)
        if domain in ("", "ai.onnx"):
            for k, value in enumerate(inputs):
                self.uses.setdefault(value, []).append("%s:%d" % (op, k))
        for a in attrs:
            aname, tensors, graphs = "", [], []
            for num, wt, val in fields(self.buf, *a):
                if num == 1:
                    aname = text(self.buf, val)
                elif num == 5:
                    tensors.append(val)
                elif num == 6:
                    graphs.append((val, None))
                elif num == 11:
                    graphs.append((val, len([g for g in graphs if g[1] is not None])))
            if op == "Constant" and domain in ("", "ai.onnx") and aname == "value":
                for tspan in tensors[-1:]:  # a singular field: the last one counts
                    t = parse_tensor(self.buf, tspan)
                    self.add(t, outputs[0], steps, "Constant node" + where)
            for gspan, k in graphs:
                step = "%s/%s" % (label, aname) if k is None else "%s/%s[%d]" % (label, aname, k)
                node_shown = "%s '%s'" % (op, name) if name else "%s #%d" % (op, index)
                shown = "%s/%s" % (node_shown, aname) if k is None else "%s/%s[%d]" % (node_shown, aname, k)
                sub_where = (where + " > " + shown) if where else " in subgraph " + shown
                self.graph(gspan, steps + [label, aname if k is None else "%s[%d]" % (aname, k)], sub_where)

    def run(self):
        with open(self.path, "rb") as f:
            size = os.fstat(f.fileno()).st_size
            mm = mmap.mmap(f.fileno(), 0, access=mmap.ACCESS_READ) if size else b""
            self.buf = memoryview(mm)
            try:
                for num, wt, val in fields(self.buf, 0, len(self.buf)):
                    if num == 7:
                        self.graph(val, [], "")
            finally:
                self.buf.release()
                if size:
                    mm.close()
        for t in self.out:
            t["consumers"] = sorted(self.uses.get(t["raw_name"], []))
        return {
            "model": self.path,
            "tensors": self.out,
            "total_elements": sum(t["count"] for t in self.out),
            "floating_elements": sum(t["count"] for t in self.out if t["floating"]),
        }


def main(argv):
    if len(argv) != 2:
        print("usage: onnx_reference.py MODEL.onnx", file=sys.stderr)
        return 2
    try:
        result = Walker(argv[1]).run()
    except Corrupt as e:
        print("onnx_reference.py: %s: %s" % (argv[1], e), file=sys.stderr)
        return 1
    json.dump(result, sys.stdout, indent=1, allow_nan=True)
    sys.stdout.write("\n")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
