#!/usr/bin/python3
"""Write heed's hostile-input corpus: files built to make a reader hang, blow
up its memory or print garbage. The loader (TestHostile) and the command
(TestHostileCommands) must refuse each one at once with one line that names
the file once and says what is wrong.

Usage (Debian's python3, which has numpy and h5py):
    /usr/bin/python3 testdata/hostile/gen.py            # rewrite the small files here
    /usr/bin/python3 testdata/hostile/gen.py --big DIR  # the big ones, into DIR (the tests do this)
    /usr/bin/python3 testdata/hostile/gen.py --big DIR --only bomb
    /usr/bin/python3 testdata/hostile/gen.py --check    # regenerate in a temp dir and compare bytes

The small files are committed. The big ones (zip bombs of hundreds of MiB
inflated, a large honest compressed export) are cheap to make and too big to
commit, so the tests write them into a temporary directory. FIFOs and
devices are made by the tests themselves.

Zip structures follow PKWARE's APPNOTE.TXT (4.3.7 local file header, 4.3.12
central directory header, 4.3.16 end of central directory record); NPY
headers follow numpy's format docstring (numpy/lib/format.py).
"""

import argparse
import io
import os
import struct
import sys
import tempfile
import zipfile
import zlib

import h5py
import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))


def npy_header(d, version=1):
    """An NPY header for the dict literal d, padded so the data starts at a multiple of 64."""
    h = d.encode("latin1")
    size = 4 if version == 1 else 6
    pad = 64 - (6 + size + len(h) + 1) % 64
    h = h + b" " * pad + b"\n"
    if version == 1:
        return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(h)) + h
    return b"\x93NUMPY\x02\x00" + struct.pack("<I", len(h)) + h


def deflate_raw(data, level=6):
    """Raw DEFLATE (RFC 1951), as a zip member holds it (no zlib wrapper)."""
    c = zlib.compressobj(level, zlib.DEFLATED, -15)
    return c.compress(data) + c.flush()


def zip_overlapping(name_fmt, n, member):
    """A zip whose n central directory entries all point at one local file:
    each member is the same deflated NPY, so the archive claims n times what
    it holds (APPNOTE 4.3.7, 4.3.12, 4.3.16; no zip64)."""
    comp = deflate_raw(member)
    crc = zlib.crc32(member)
    first = (name_fmt % 0).encode()
    local = struct.pack("<IHHHHHIIIHH", 0x04034B50, 20, 0, 8, 0, 0x21, crc, len(comp), len(member), len(first), 0) + first + comp
    cd = b""
    for i in range(n):
        nm = (name_fmt % i).encode()
        cd += struct.pack("<IHHHHHHIIIHHHHHII", 0x02014B50, 20, 20, 0, 8, 0, 0x21, crc, len(comp), len(member),
                          len(nm), 0, 0, 0, 0, 0, 0) + nm
    eocd = struct.pack("<IHHHHIIH", 0x06054B50, 0, 0, n, n, len(cd), len(local), 0)
    return local + cd + eocd


def write(path, data):
    with open(path, "wb") as f:
        f.write(data)


def gen_small(out):
    os.makedirs(out, exist_ok=True)
    w = lambda name, data: write(os.path.join(out, name), data)

    # A deflated member whose zip entries (local and central) declare
    # 0xFFFFFFF0 bytes uncompressed for 87 compressed ones, with an NPY
    # header that claims 16 GiB.
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as z:
        z.writestr(zipfile.ZipInfo("decoder/attn.npy", (1980, 1, 1, 0, 0, 0)),
                   npy_header("{'descr': '<f4', 'fortran_order': False, 'shape': (1073741824, 4), }") + b"\0" * 1024,
                   compress_type=zipfile.ZIP_DEFLATED)
    b = bytearray(buf.getvalue())
    assert b[:4] == b"PK\x03\x04"
    b[22:26] = struct.pack("<I", 0xFFFFFFF0)  # local header: uncompressed size
    cd = b.rfind(b"PK\x01\x02")
    b[cd + 24:cd + 28] = struct.pack("<I", 0xFFFFFFF0)  # central header: uncompressed size
    w("declared_size.npz", bytes(b))

    # 400 members, all the same 1 MiB of deflated zeros (a non-recursive
    # zip bomb: the members overlap).
    w("overlap.npz", zip_overlapping("decoder/attn/%d.npy", 400,
                                      npy_header("{'descr': '<f4', 'fortran_order': False, 'shape': (262144,), }") + b"\0" * (1 << 20)))

    # NPY headers a few KiB long whose bad part is long too, one with line
    # breaks and control characters in a key
    d = b"\0" * 16
    w("long_key.npy", npy_header("{'descr': '<f4', 'fortran_order': False, 'shape': (2, 2), 'x" + "A" * 3000 + "': 1}") + d)
    w("long_dtype.npy", npy_header("{'descr': '<" + "f" * 3000 + "', 'fortran_order': False, 'shape': (2, 2), }") + d)
    w("long_dim.npy", npy_header("{'descr': '<f4', 'fortran_order': False, 'shape': (2, " + "9" * 3000 + "), }") + d)
    w("newline_key.npy", npy_header("{'descr': '<f4', 'fortran_order': False, 'shape': (2, 2), 'a\nb\r\x1b[31mc" + "\n" * 2000 + "': 1}", version=2) + d)

    # an HDF5 dataset created chunked and compressed (as h5py does with
    # compression=...) but never written: no chunk is allocated
    with h5py.File(os.path.join(out, "unwritten_chunked.h5"), "w") as f:
        f.create_dataset("decoder/attn", shape=(32, 32, 4096, 4096), dtype="f2", chunks=(1, 1, 4096, 4096), compression="gzip")


def gen_big(out, only=None):
    os.makedirs(out, exist_ok=True)
    if only in (None, "bomb"):
        gen_bomb(out)
    if only in (None, "onehot"):
        gen_onehot(out)


def gen_bomb(out):
    # bomb.npz: 1 GiB of float32 zeros deflated (about 1 MB; zlib makes
    # 1028.7:1 of constant data). Written by streaming, so this script never
    # holds it.
    shape = (8, 1, 8, 2048, 2048)  # 8 x 128 MiB
    zi = zipfile.ZipInfo("decoder/attn.npy", (1980, 1, 1, 0, 0, 0))
    zi.compress_type = zipfile.ZIP_DEFLATED
    with zipfile.ZipFile(os.path.join(out, "bomb.npz"), "w") as z, z.open(zi, "w", force_zip64=True) as f:
        f.write(npy_header("{'descr': '<f4', 'fortran_order': False, 'shape': %r, }" % (shape,)))
        chunk = b"\0" * (64 << 20)
        for _ in range(int(np.prod(shape)) * 4 // len(chunk)):
            f.write(chunk)


def gen_onehot(out):
    # onehot.npz: an honest export that compresses about 600:1, float16
    # heads whose rows put all their weight on one key (causal: a key at
    # or before the query), 256 MiB inflated: heed must inflate it into a
    # temporary file and read it without holding it in memory.
    shape = (4, 1, 8, 2048, 2048)
    zi = zipfile.ZipInfo("decoder/attn.npy", (1980, 1, 1, 0, 0, 0))
    zi.compress_type = zipfile.ZIP_DEFLATED
    q = np.arange(shape[3])
    with zipfile.ZipFile(os.path.join(out, "onehot.npz"), "w") as z, z.open(zi, "w", force_zip64=True) as f:
        f.write(npy_header("{'descr': '<f2', 'fortran_order': False, 'shape': %r, }" % (shape,)))
        for i in range(shape[0] * shape[2]):
            h = np.zeros(shape[3:], np.float16)
            h[q, (q * 7 + i) % (q + 1)] = 1
            f.write(h.tobytes())


def check():
    """Regenerate the small files in a temporary directory and compare them
    byte for byte with the committed ones."""
    problems = []
    with tempfile.TemporaryDirectory() as tmp:
        gen_small(tmp)
        fresh = sorted(os.listdir(tmp))
        committed = sorted(n for n in os.listdir(HERE) if n != "gen.py")
        for n in sorted(set(fresh) | set(committed)):
            if n not in committed:
                problems.append("missing from the committed corpus: " + n)
            elif n not in fresh:
                problems.append("committed but no longer generated: " + n)
            elif open(os.path.join(tmp, n), "rb").read() != open(os.path.join(HERE, n), "rb").read():
                problems.append("differs from a fresh generation: " + n)
    for p in problems:
        print("hostile/gen.py --check: " + p, file=sys.stderr)
    if problems:
        return 1
    print("hostile/gen.py --check: %d committed files match (numpy %s, h5py %s)" % (len(fresh), np.__version__, h5py.__version__))
    return 0


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--big", metavar="DIR", help="write the big files into DIR instead")
    ap.add_argument("--only", choices=["bomb", "onehot"], help="with --big: only this one")
    ap.add_argument("--check", action="store_true", help="regenerate the small files in a temporary directory and compare")
    args = ap.parse_args()
    if args.check:
        return check()
    if args.big:
        gen_big(args.big, args.only)
    else:
        gen_small(HERE)


if __name__ == "__main__":
    sys.exit(main())
