#!/usr/bin/env python3
"""Writes .npz fixtures for tests/io/numpy_test.cpp with the Python standard library only
(struct for the .npy bytes, zipfile for the archives): a writer independent of lobit's.

Usage: make_fixtures.py OUTPUT_FOLDER

The element values follow formulas the C++ test recomputes:
  a.npy  <f4 (3, 4)   a[i] = 0.5 * i - 2           (C order)
  b.npy  >i2 (5,)     b[i] = 1000 * i - 2000       (big endian)
  s.npy  <f8 ()       pi (the double nearest to it)
  h.npy  <f2 (2, 3)   h[i] = 0.25 * i - 1          (Fortran order flag set)
  big.npy <f4 (1048576,)  big[i] = float32(((i * 2654435761) % 2**32) / 2**32 - 0.5)
"""
import binascii
import os
import struct
import sys
import zipfile


def npy(descr, shape, payload, fortran=False):
    """A version 1.0 .npy file: magic, version, u16 header length, dict, data."""
    if len(shape) == 1:
        tup = "(%d,)" % shape[0]
    else:
        tup = "(" + ", ".join(str(d) for d in shape) + ")"
    d = "{'descr': '%s', 'fortran_order': %s, 'shape': %s, }" % (descr, "True" if fortran else "False", tup)
    pad = (64 - (10 + len(d) + 1) % 64) % 64
    d = d + " " * pad + "\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(d)) + d.encode("latin1") + payload


def members():
    a = npy("<f4", (3, 4), struct.pack("<12f", *[0.5 * i - 2 for i in range(12)]))
    b = npy(">i2", (5,), struct.pack(">5h", *[1000 * i - 2000 for i in range(5)]))
    s = npy("<f8", (), struct.pack("<d", 3.141592653589793))
    h = npy("<f2", (2, 3), struct.pack("<6e", *[0.25 * i - 1 for i in range(6)]), fortran=True)
    return [("a.npy", a), ("b.npy", b), ("s.npy", s), ("h.npy", h)]


_big = []


def big_member():
    if _big:
        return _big[0]
    n = 1 << 20
    vals = [((i * 2654435761) % 2**32) / 2**32 - 0.5 for i in range(n)]
    _big.append(npy("<f4", (n,), struct.pack("<%df" % n, *vals)))
    return _big[0]


def write_zip(path, items, method, comment=b"", zip64=False):
    with zipfile.ZipFile(path, "w", compression=method) as zf:
        for name, data in items:
            if zip64:
                info = zipfile.ZipInfo(name)
                info.compress_type = method
                with zf.open(info, "w", force_zip64=True) as f:
                    f.write(data)
            else:
                zf.writestr(name, data)
        zf.comment = comment


def write_full_zip64(path, items):
    """A stored archive in which every size and offset field holds 0xFFFFFFFF (0xFFFF for the
    entry counts) and the values live in zip64 extra fields and the zip64 end records
    (PKWARE APPNOTE.TXT sections 4.3.14-4.3.16 and 4.5.3; allowed for small archives too)."""
    out = b""
    central = b""
    for name, data in items:
        crc = binascii.crc32(data)
        n = name.encode()
        offset = len(out)
        extra = struct.pack("<HHQQ", 1, 16, len(data), len(data))
        out += struct.pack("<IHHHHHIIIHH", 0x04034B50, 45, 0, 0, 0, 0x21, crc, 0xFFFFFFFF, 0xFFFFFFFF, len(n),
                           len(extra)) + n + extra + data
        cextra = struct.pack("<HHQQQ", 1, 24, len(data), len(data), offset)
        central += struct.pack("<IHHHHHHIIIHHHHHII", 0x02014B50, 45, 45, 0, 0, 0, 0x21, crc, 0xFFFFFFFF,
                               0xFFFFFFFF, len(n), len(cextra), 0, 0, 0, 0, 0xFFFFFFFF) + n + cextra
    cd_offset = len(out)
    out += central
    z64 = len(out)
    out += struct.pack("<IQHHIIQQQQ", 0x06064B50, 44, 45, 45, 0, 0, len(items), len(items), len(central), cd_offset)
    out += struct.pack("<IIQI", 0x07064B50, 0, z64, 1)
    out += struct.pack("<IHHHHIIH", 0x06054B50, 0, 0, 0xFFFF, 0xFFFF, 0xFFFFFFFF, 0xFFFFFFFF, 0)
    with open(path, "wb") as f:
        f.write(out)


def corrupt_member(path, name, fraction):
    """Overwrites 64 bytes of a member's compressed data, `fraction` of the way in."""
    with zipfile.ZipFile(path) as zf:
        info = zf.getinfo(name)
    with open(path, "r+b") as f:
        f.seek(info.header_offset)
        local = f.read(30)
        name_len, extra_len = struct.unpack("<HH", local[26:30])
        start = info.header_offset + 30 + name_len + extra_len
        f.seek(start + int(info.compress_size * fraction))
        f.write(b"\xff" * 64)


def main():
    out = sys.argv[1]
    os.makedirs(out, exist_ok=True)
    p = lambda name: os.path.join(out, name)
    write_zip(p("stored.npz"), members(), zipfile.ZIP_STORED, comment=b"an archive comment")
    write_zip(p("deflated.npz"), members(), zipfile.ZIP_DEFLATED)
    write_zip(p("zip64.npz"), members(), zipfile.ZIP_STORED, zip64=True)
    write_zip(p("zip64_deflated.npz"), members(), zipfile.ZIP_DEFLATED, zip64=True)
    write_full_zip64(p("full_zip64.npz"), members())
    write_zip(p("big_stored.npz"), [("big.npy", big_member())], zipfile.ZIP_STORED)
    write_zip(p("big_deflated.npz"), [("big.npy", big_member())], zipfile.ZIP_DEFLATED)
    write_zip(p("corrupt_late.npz"), [("big.npy", big_member())], zipfile.ZIP_DEFLATED)
    corrupt_member(p("corrupt_late.npz"), "big.npy", 0.75)
    write_zip(p("corrupt_early.npz"), [("big.npy", big_member())], zipfile.ZIP_DEFLATED)
    corrupt_member(p("corrupt_early.npz"), "big.npy", 0.0)
    write_zip(p("not_npy.npz"), members()[:1] + [("notes.txt", b"not an array")], zipfile.ZIP_STORED)
    write_zip(p("no_magic.npz"), [("x.npy", b"this is not a NumPy array at all")], zipfile.ZIP_DEFLATED)
    # The header says 10 float32 (40 bytes) but the member has 36 bytes of data.
    write_zip(p("short_member.npz"), [("x.npy", npy("<f4", (10,), b"\0" * 36))], zipfile.ZIP_STORED)
    write_zip(p("empty.npz"), [], zipfile.ZIP_STORED)
    with open(p("truncated.npz"), "wb") as f:
        with open(p("stored.npz"), "rb") as g:
            f.write(g.read()[:200])


if __name__ == "__main__":
    main()
