#!/usr/bin/python3
"""Write heed's loader fixtures with numpy, h5py and PyTorch, and beside each
file a JSON of what those libraries report about it (shape, dtype, CRC-32 of
the values converted to float32 / int64, the values themselves for small
arrays, the strings). The Go tests in loader/ and cmd/heed/ compare heed's
reading with these reports exactly.

Usage (Debian's python3, which has numpy, h5py and torch):
    /usr/bin/python3 testdata/gen_fixtures.py            # rewrite testdata/fixtures
    /usr/bin/python3 testdata/gen_fixtures.py --check    # regenerate in a temp dir and compare

--check catches a numpy / h5py / torch change: it regenerates every fixture
in a temporary directory and compares the reports (and the bytes of the
formats whose bytes are deterministic: NPY and safetensors), and it has the
libraries re-read the committed files and compares with the committed reports.

Data is built from arithmetic on indices (no random generator), so it does
not depend on numpy's RNG streams. Safetensors files are written by hand
from the format's specification (u64 LE header size, JSON header padded with
spaces to 8 bytes, little-endian C-order data); no safetensors package is
used. Exports follow heed-export/1 (see the README).
"""

import argparse
import json
import os
import shutil
import struct
import sys
import tempfile
import zipfile
import zlib

import h5py
import numpy as np
import torch

HERE = os.path.dirname(os.path.abspath(__file__))
DEFAULT_OUT = os.path.join(HERE, "fixtures")

# heed's names for numpy dtypes (loader.DType.String)
HEED_DTYPE = {
    ("b", 1): "bool", ("i", 1): "i8", ("i", 2): "i16", ("i", 4): "i32", ("i", 8): "i64",
    ("u", 1): "u8", ("u", 2): "u16", ("u", 4): "u32", ("u", 8): "u64",
    ("f", 2): "f16", ("f", 4): "f32", ("f", 8): "f64",
}

SMALL = 512  # arrays up to this many elements are reported value by value


def heed_dtype(a):
    if a.dtype.kind in "USO":
        return "str"
    return HEED_DTYPE[(a.dtype.kind, a.dtype.itemsize)]


def f32_bits(a):
    """numpy's conversion to float32, as little-endian uint32 bits, C order."""
    return np.ascontiguousarray(a.astype("<f4")).view("<u4").ravel()


def as_str(x):
    if isinstance(x, bytes):
        return x.decode("utf-8")
    return str(x)


def report_array(name, a, heed=None, source_dtype=None):
    """What numpy reports about array a (already read by numpy / h5py)."""
    r = {"name": name, "dtype": heed or heed_dtype(a), "numpy_dtype": source_dtype or a.dtype.str,
         "shape": list(a.shape)}
    if r["dtype"] == "str":
        r["strings"] = [as_str(x) for x in np.asarray(a).ravel(order="C").tolist()]
        return r
    bits = f32_bits(a)
    r["crc32_f32"] = zlib.crc32(bits.tobytes())
    if a.size <= SMALL:
        r["f32_bits"] = ["%08x" % b for b in bits.tolist()]
    if a.dtype.kind in "biu":
        i64 = np.ascontiguousarray(a.astype("<i8"))
        r["crc32_i64"] = zlib.crc32(i64.tobytes())
        if a.size <= SMALL:
            r["i64"] = [str(v) for v in i64.ravel().tolist()]
    return r


def write_json(path, obj):
    with open(path, "w") as f:
        json.dump(obj, f, indent=1, sort_keys=True, ensure_ascii=False)
        f.write("\n")


def grid(shape, scale=1.0, offset=0.0):
    """Deterministic values in [0, 1): a fractional part of a linear form."""
    n = int(np.prod(shape)) if len(shape) else 1
    v = (np.arange(n, dtype=np.float64) * 0.6180339887498949 + 0.1) % 1.0
    return (v * scale + offset).reshape(shape)


def softmax_rows(scores, allowed):
    s = np.where(allowed, scores, -np.inf)
    s = s - s.max(axis=-1, keepdims=True)
    e = np.exp(s)
    e = np.where(allowed, e, 0.0)
    return e / e.sum(axis=-1, keepdims=True)


def causal(q, k):
    off = k - q
    return np.tril(np.ones((q, k), dtype=bool), k=off)


# ---------------------------------------------------------------- NPY

def int_values(dt, shape):
    """Integers of dtype dt covering its extremes, zero, +-1 and ordinary values."""
    info = np.iinfo(dt)
    lo, hi = int(info.min), int(info.max)
    base = [lo, hi, 0, 1, -1 if lo < 0 else 2, hi // 3, lo // 7, 12345 % (hi + 1)]
    n = int(np.prod(shape))
    v = [min(max(base[i % 8] + (i // 8 if i % 8 >= 2 else 0), lo), hi) for i in range(n)]
    return np.array(v, dtype=dt).reshape(shape)


def gen_npy(out):
    d = os.path.join(out, "npy")
    os.makedirs(d)
    reports = []

    def save(fname, a, version=None, name=None):
        path = os.path.join(d, fname)
        with open(path, "wb") as f:
            np.lib.format.write_array(f, a, version=version, allow_pickle=False)
        back = np.load(path, allow_pickle=False)  # what numpy reports for the file
        rep = {"file": "npy/" + fname, "format": "npy", "meta": None,
               "version": "%d.%d" % (version or np.lib.format.read_magic(open(path, "rb"))),
               "fortran_order": bool(back.flags.f_contiguous and not back.flags.c_contiguous),
               "arrays": [report_array(name or os.path.splitext(fname)[0], back)]}
        write_json(path + ".json", rep)
        reports.append(rep)

    shape = (2, 3, 4)
    for dt in ["<f2", "<f4", "<f8", "|b1", "|i1", "<i2", "<i4", "<i8", "|u1", "<u2", "<u4", "<u8",
               ">f2", ">f4", ">f8", ">i2", ">i4", ">i8", ">u2", ">u4", ">u8"]:
        k = np.dtype(dt)
        if k.kind == "f":
            a = (grid(shape, 3.0, -1.0)).astype(dt)
        elif k.kind == "b":
            a = (grid(shape) > 0.5).astype(dt)
        else:
            a = int_values(k.newbyteorder("="), shape).astype(dt)
        tag = {"<": "le", ">": "be", "|": "na"}[dt[0]]
        save("%s_%s.npy" % (heed_dtype(a), tag), a)
    # Fortran order (numpy writes fortran_order True and the transposed bytes)
    save("f32_fortran.npy", np.asfortranarray(grid((2, 3, 4)).astype("<f4")))
    save("f64_be_fortran.npy", np.asfortranarray(grid((3, 5), 10.0).astype(">f8")))
    save("i16_fortran.npy", np.asfortranarray(int_values(np.int16, (4, 3))))
    save("str_fortran.npy", np.asfortranarray(np.array([["ab", "c"], ["def", ""], ["g", "hij"]], dtype="<U3")))
    # versions 1.0, 2.0, 3.0
    for v in [(1, 0), (2, 0), (3, 0)]:
        save("f16_v%d.npy" % v[0], grid((2, 2, 3)).astype("<f2"), version=v)
    # float16 specials: +-0, +-inf, NaN, subnormals, max
    spec = np.array([0x0000, 0x8000, 0x7C00, 0xFC00, 0x7E00, 0x7C01, 0x0001, 0x03FF, 0x7BFF, 0x3C00, 0xBC00, 0x3555],
                    dtype="<u2").view("<f2")
    save("f16_special.npy", spec)
    # strings: numpy 'U' (UCS-4) in both byte orders, 'S' bytes, 2-D tokens
    save("tokens_u.npy", np.array(["The", " cat", " sät", " on", "🙂", ""], dtype="<U4"))
    save("tokens_u_be.npy", np.array(["ab", "cd", "é"], dtype=">U2"))
    save("tokens_s.npy", np.array([b"ab", b"c", b"", b"defg"], dtype="|S4"))
    save("tokens_2d.npy", np.array([["a", "b", "c"], ["d", "e", "f"]]))
    # shapes: 0-d, empty, 1-d
    save("scalar_f64.npy", np.array(2.5))
    save("empty_f32.npy", np.zeros((0, 3), dtype="<f4"))
    return reports


# ---------------------------------------------------------------- NPZ

def npz_report(path, rel):
    with np.load(path, allow_pickle=False) as z:
        arrays, meta = [], None
        for name in sorted(z.files):
            a = z[name]
            if name == "meta":
                meta = str(a[()])
                continue
            arrays.append(report_array(name, a))
    with zipfile.ZipFile(path) as zf:
        methods = sorted({("stored" if i.compress_type == zipfile.ZIP_STORED else "deflated") for i in zf.infolist()})
    return {"file": rel, "format": "npz", "meta": meta, "arrays": arrays, "members": methods}


def export_causal_arrays():
    L, B, H, Q = 2, 2, 2, 5
    sc = grid((L, B, H, Q, Q), 4.0)
    allowed = causal(Q, Q)
    valid = np.array([[1, 1, 1, 1, 1], [1, 1, 1, 0, 0]], dtype=bool)
    a = softmax_rows(sc, allowed & valid[None, :, None, None, :]).astype(np.float16)
    g = (grid((L, B, H, Q, Q), 2.0, -1.0)).astype(np.float16)
    meta = {"format": "heed-export/1", "blocks": {"decoder": {"kind": "causal", "query": "target", "key": "target",
                                                              "axes": "layer batch head query key"}}}
    return {"decoder/attn": a, "decoder/grad": g,
            "tokens/target": np.array(["The", " cat", " sat", " on", "<pad>"]),
            "valid/target": valid, "meta": np.array(json.dumps(meta))}


def gen_npz(out):
    d = os.path.join(out, "npz")
    os.makedirs(d)
    reports = []
    ex = export_causal_arrays()
    np.savez(os.path.join(d, "stored.npz"), **ex)
    np.savez_compressed(os.path.join(d, "deflated.npz"), **ex)
    # Force zip64 end records and central-directory extras as well as the
    # local zip64 extras numpy always writes (numpy gh-10776): with these
    # limits at 0 every size and offset counts as large for zipfile.
    saved = (zipfile.ZIP64_LIMIT, zipfile.ZIP_FILECOUNT_LIMIT)
    zipfile.ZIP64_LIMIT, zipfile.ZIP_FILECOUNT_LIMIT = 0, 0
    try:
        np.savez_compressed(os.path.join(d, "zip64.npz"), **ex)
    finally:
        zipfile.ZIP64_LIMIT, zipfile.ZIP_FILECOUNT_LIMIT = saved
    with open(os.path.join(d, "zip64.npz"), "rb") as f:
        assert b"PK\x06\x06" in f.read(), "zip64 end record missing"
    # mixed members and names that are not part of the convention
    np.savez(os.path.join(d, "plain.npz"), grid((3, 4)).astype("<f4"), big=grid((2, 2)).astype(">f8"),
             toks=np.array(["x", "y"]))
    for f in ["stored.npz", "deflated.npz", "zip64.npz", "plain.npz"]:
        rep = npz_report(os.path.join(d, f), "npz/" + f)
        write_json(os.path.join(d, f + ".json"), rep)
        reports.append(rep)
    return reports


# ---------------------------------------------------------------- safetensors

ST_DTYPE = {"bool": "BOOL", "u8": "U8", "i8": "I8", "i16": "I16", "u16": "U16", "i32": "I32", "u32": "U32",
            "i64": "I64", "u64": "U64", "f16": "F16", "f32": "F32", "f64": "F64"}


def write_safetensors(path, tensors, metadata=None):
    """tensors: list of (name, dtype string, shape, little-endian bytes)."""
    header = {}
    if metadata is not None:
        header["__metadata__"] = metadata
    off = 0
    for name, dt, shape, raw in tensors:
        header[name] = {"dtype": dt, "shape": list(shape), "data_offsets": [off, off + len(raw)]}
        off += len(raw)
    h = json.dumps(header, separators=(",", ":")).encode("utf-8")
    h += b" " * ((8 - len(h) % 8) % 8)
    with open(path, "wb") as f:
        f.write(struct.pack("<Q", len(h)))
        f.write(h)
        for _, _, _, raw in tensors:
            f.write(raw)


def bf16_of(x):
    """PyTorch's float32 -> bfloat16 rounding, returned as uint16 bits."""
    t = torch.tensor(np.asarray(x, dtype=np.float32)).to(torch.bfloat16)
    return t.view(torch.int16).numpy().view(np.uint16)


def bf16_to_f32_torch(bits):
    """PyTorch's bfloat16 -> float32 conversion of uint16 bits."""
    t = torch.from_numpy(np.asarray(bits, dtype=np.uint16).view(np.int16).copy()).view(torch.bfloat16)
    return t.float().numpy()


def read_safetensors(path):
    """Read a safetensors file with numpy per the spec (for the report)."""
    with open(path, "rb") as f:
        b = f.read()
    n = struct.unpack("<Q", b[:8])[0]
    hdr = json.loads(b[8:8 + n])
    meta = hdr.pop("__metadata__", None)
    data = b[8 + n:]
    out = {}
    np_dt = {"BOOL": "|b1", "U8": "|u1", "I8": "|i1", "I16": "<i2", "U16": "<u2", "I32": "<i4", "U32": "<u4",
             "I64": "<i8", "U64": "<u8", "F16": "<f2", "F32": "<f4", "F64": "<f8", "BF16": "<u2"}
    for name, e in hdr.items():
        s, t = e["data_offsets"]
        a = np.frombuffer(data[s:t], dtype=np_dt[e["dtype"]]).reshape(e["shape"])
        out[name] = (e["dtype"], a)
    return out, meta


def st_report(path, rel):
    arrays, meta = read_safetensors(path)
    reps = []
    for name in sorted(arrays):
        dt, a = arrays[name]
        if dt == "BF16":
            r = report_array(name, bf16_to_f32_torch(a), heed="bf16", source_dtype="BF16 (torch)")
        else:
            r = report_array(name, a, source_dtype=dt)
        reps.append(r)
    return {"file": rel, "format": "safetensors", "meta": (meta or {}).get("meta"), "metadata": meta, "arrays": reps}


def gen_safetensors(out):
    d = os.path.join(out, "safetensors")
    os.makedirs(d)
    shape = (2, 3, 4)
    tensors = []
    for heed, st in ST_DTYPE.items():
        if heed.startswith("f"):
            a = grid(shape, 3.0, -1.0).astype({"f16": "<f2", "f32": "<f4", "f64": "<f8"}[heed])
        elif heed == "bool":
            a = grid(shape) > 0.5
        else:
            dt = np.dtype({"u8": "u1", "i8": "i1", "i16": "i2", "u16": "u2", "i32": "i4", "u32": "u4", "i64": "i8", "u64": "u8"}[heed])
            a = int_values(dt, shape).astype(dt.newbyteorder("<"))
        tensors.append(("t_" + heed, st, shape, np.ascontiguousarray(a).tobytes()))
    bf = bf16_of(grid(shape, 3.0, -1.0))
    tensors.append(("t_bf16", "BF16", shape, bf.astype("<u2").tobytes()))
    tensors.append(("t_empty", "F32", (0, 4), b""))
    tensors.append(("t_scalar", "F64", (), np.array(1.25, "<f8").tobytes()))
    write_safetensors(os.path.join(d, "dtypes.safetensors"), tensors, {"note": "every dtype", "meta": '{"format":"heed-export/1"}'})
    reports = []
    rep = st_report(os.path.join(d, "dtypes.safetensors"), "safetensors/dtypes.safetensors")
    write_json(os.path.join(d, "dtypes.safetensors.json"), rep)
    reports.append(rep)
    return reports


# ---------------------------------------------------------------- HDF5

def h5_report(path, rel):
    arrays = []
    with h5py.File(path, "r") as f:
        meta = f.attrs.get("meta")
        if isinstance(meta, bytes):
            meta = meta.decode()

        def visit(name, obj):
            if not isinstance(obj, h5py.Dataset):
                return
            a = obj[()]
            a = np.asarray(a)
            if obj.dtype.kind == "O" or h5py.check_string_dtype(obj.dtype) is not None:
                strs = obj.asstr()[()] if h5py.check_string_dtype(obj.dtype) is not None else a
                r = {"name": name, "dtype": "str", "numpy_dtype": str(obj.dtype), "shape": list(obj.shape),
                     "strings": [as_str(x) for x in np.asarray(strs, dtype=object).ravel().tolist()]}
            else:
                r = report_array(name, a, source_dtype=obj.dtype.str)
            attrs = {}
            for k in ["kind", "query", "key", "axes", "window", "prefix", "kv_heads"]:
                if k in obj.attrs:
                    v = obj.attrs[k]
                    attrs[k] = as_str(v) if not isinstance(v, (np.integer, int)) else str(int(v))
            if attrs:
                r["attrs"] = attrs
            r["chunks"] = list(obj.chunks) if obj.chunks else None
            r["compression"] = obj.compression
            arrays.append(r)

        f.visititems(visit)
    arrays.sort(key=lambda r: r["name"])
    return {"file": rel, "format": "hdf5", "meta": meta, "arrays": arrays}


def gen_hdf5(out):
    d = os.path.join(out, "hdf5")
    os.makedirs(d)
    shape = (2, 3, 4)
    p = os.path.join(d, "types.h5")
    with h5py.File(p, "w", track_order=False) as f:
        f.attrs["meta"] = '{"format":"heed-export/1"}'
        f.attrs["count"] = np.int64(3)
        f["f16"] = grid(shape, 3.0, -1.0).astype("<f2")
        f["f16_special"] = np.array([0x0000, 0x8000, 0x7C00, 0xFC00, 0x0001, 0x03FF, 0x7BFF, 0x3C00, 0xBC00, 0x3555],
                                    dtype="<u2").view("<f2")
        f["f32"] = grid(shape, 3.0, -1.0).astype("<f4")
        f["f64_be"] = grid(shape, 3.0, -1.0).astype(">f8")
        f["f32_be"] = grid(shape, 3.0, -1.0).astype(">f4")
        for dt in ["i1", "i2", "i4", "i8", "u1", "u2", "u4", "u8"]:
            f["int/" + heed_dtype(np.zeros(1, dt))] = int_values(np.dtype(dt), shape)
        f["bool"] = grid(shape) > 0.5
        f["scalar"] = np.float64(2.5)
        f["str/vlen_utf8"] = np.array(["The", " cat", " sät", "🙂", ""], dtype=h5py.string_dtype("utf-8"))
        f["str/vlen_ascii"] = np.array([b"ab", b"c"], dtype=h5py.string_dtype("ascii"))
        f["str/fixed"] = np.array([b"ab", b"cde", b""], dtype="S3")
        f["str/tokens_2d"] = np.array([["a", "b"], ["c", "d"]], dtype=h5py.string_dtype("utf-8"))
        f.create_dataset("chunked/gzip_f16", data=grid((2, 3, 8, 8)).astype("<f2"), chunks=(1, 1, 8, 8), compression="gzip")
        f.create_dataset("chunked/edges_f32", data=grid((5, 7)).astype("<f4"), chunks=(2, 3), compression="gzip", shuffle=True)
        ds = f.create_dataset("chunked/big_chunks", data=grid((2, 4, 16, 16)).astype("<f4"), chunks=(1, 4, 16, 16), compression="gzip")
        ds.attrs["kind"] = "causal"
        ds.attrs["window"] = np.int64(4)
    reports = []
    rep = h5_report(p, "hdf5/types.h5")
    write_json(p + ".json", rep)
    reports.append(rep)
    return reports


# ---------------------------------------------------------------- exports (heed info)

# heed info's "rules" are a block's mask rules, those heed check lists as
# "rules checked:" (analysis.NewRules): causal on a causal block, prefix with
# it when P > 0, window when W > 0, segments for document ids on a
# self-attention block, padding for a valid mask on the key side, explicit
# for BLOCK/allow. Its "row_checks" are the rules judging whole rows, run on
# every block (analysis rowChecks), then cut on a cross block and where the
# prefix rule applies (analysis/cut.go).
ROW_CHECKS = ["nan_rows", "row_sum", "negative"]


def info_expect(blocks, sides):
    return {"blocks": blocks, "sides": sides}


def gen_exports(out):
    d = os.path.join(out, "exports")
    os.makedirs(d)
    expects = {}

    # 1. causal decoder with grads and padding, numpy.savez (stored)
    ex = export_causal_arrays()
    np.savez(os.path.join(d, "causal.npz"), **ex)
    expects["causal.npz"] = info_expect(
        [{"name": "decoder", "kind": "causal", "dtype": "f16", "layers": 2, "batch": 2, "heads": 2, "queries": 5, "keys": 5,
          "query_offset": 0, "grad": True, "allow": False, "valid": True, "segments": False, "out": False,
          "query_side": "target", "key_side": "target", "rules": ["causal", "padding"], "row_checks": ROW_CHECKS}],
        [{"name": "target", "len": 5, "first_tokens": ["The", " cat", " sat", " on", "<pad>"],
          "padding": int((~ex["valid/target"]).sum())}])

    # 2. encoder-decoder in HDF5 (h5py), gzip-chunked float16, vlen and fixed strings
    S, T, L, H = 4, 3, 2, 2
    src_valid = np.array([[1, 1, 1, 0]], dtype=bool)
    enc = softmax_rows(grid((L, 1, H, S, S), 3.0), np.ones((S, S), bool) & src_valid[None, :, None, None, :]).astype(np.float16)
    dec = softmax_rows(grid((L, 1, H, T, T), 3.0, 0.5), causal(T, T)).astype(np.float16)
    crs = softmax_rows(grid((L, 1, H, T, S), 3.0, 0.25), np.ones((T, S), bool) & src_valid[None, :, None, None, :]).astype(np.float16)
    meta = {"format": "heed-export/1", "blocks": {
        "encoder": {"kind": "bidirectional", "query": "source", "key": "source"},
        "decoder": {"kind": "causal", "query": "target", "key": "target"},
        "cross": {"kind": "cross", "query": "target", "key": "source"}}}
    with h5py.File(os.path.join(d, "encdec.h5"), "w") as f:
        f.attrs["meta"] = json.dumps(meta)
        for name, a in [("encoder", enc), ("decoder", dec), ("cross", crs)]:
            f.create_dataset(name + "/attn", data=a, chunks=(1, 1, 1) + a.shape[3:], compression="gzip")
        f["tokens/source"] = np.array(["Der", " Käse", " ist", "<pad>"], dtype=h5py.string_dtype("utf-8"))
        f["tokens/target"] = np.array([b"The", b" che", b"ese"], dtype="S4")
        f["valid/source"] = src_valid
    expects["encdec.h5"] = info_expect(
        [{"name": "cross", "kind": "cross", "dtype": "f16", "layers": 2, "batch": 1, "heads": 2, "queries": 3, "keys": 4,
          "query_offset": 0, "grad": False, "allow": False, "valid": True, "segments": False, "out": False,
          "query_side": "target", "key_side": "source", "rules": ["padding"], "row_checks": ROW_CHECKS + ["cut"]},
         {"name": "decoder", "kind": "causal", "dtype": "f16", "layers": 2, "batch": 1, "heads": 2, "queries": 3, "keys": 3,
          "query_offset": 0, "grad": False, "allow": False, "valid": False, "segments": False, "out": False,
          "query_side": "target", "key_side": "target", "rules": ["causal"], "row_checks": ROW_CHECKS},
         {"name": "encoder", "kind": "bidirectional", "dtype": "f16", "layers": 2, "batch": 1, "heads": 2, "queries": 4,
          "keys": 4, "query_offset": 0, "grad": False, "allow": False, "valid": True, "segments": False, "out": False,
          "query_side": "source", "key_side": "source", "rules": ["padding"], "row_checks": ROW_CHECKS}],
        [{"name": "source", "len": 4, "first_tokens": ["Der", " Käse", " ist", "<pad>"], "padding": int((~src_valid).sum())},
         {"name": "target", "len": 3, "first_tokens": ["The", " che", "ese"], "padding": 0}])

    # 3. grouped-query, sliding-window, packed documents, per-layer bf16 in safetensors, with activations and logits
    Hq, T = 4, 6
    seg = np.array([[0, 0, 0, 1, 1, 1]], dtype=np.int64)
    allowed = causal(T, T) & (seg[0][:, None] == seg[0][None, :]) & (np.arange(T)[:, None] - np.arange(T)[None, :] < 3)
    tensors = []
    for l in range(2):
        a = softmax_rows(grid((1, Hq, T, T), 3.0, 0.1 * l), allowed)
        tensors.append(("decoder/attn/%d" % l, "BF16", a.shape, bf16_of(a).astype("<u2").tobytes()))
    tensors.append(("decoder/out", "F32", (3, 1, T, 8), grid((3, 1, T, 8), 2.0, -1.0).astype("<f4").tobytes()))
    tensors.append(("logits", "F32", (1, T, 11), grid((1, T, 11), 10.0, -5.0).astype("<f4").tobytes()))
    tensors.append(("segments/target", "I64", (1, T), seg.astype("<i8").tobytes()))
    tensors.append(("decoder/allow", "BOOL", (T, T), allowed.astype(np.uint8).tobytes()))
    meta = {"format": "heed-export/1", "blocks": {"decoder": {"kind": "causal", "query": "target", "key": "target",
                                                              "window": 3, "kv_heads": 2}}}
    write_safetensors(os.path.join(d, "gqa.safetensors"), tensors, {"meta": json.dumps(meta)})
    expects["gqa.safetensors"] = info_expect(
        [{"name": "decoder", "kind": "causal", "dtype": "bf16", "layers": 2, "batch": 1, "heads": 4, "kv_heads": 2,
          "window": 3, "queries": 6, "keys": 6, "query_offset": 0, "grad": False, "allow": True, "valid": False,
          "segments": True, "out": True, "out_layers": 3, "positions": 6, "features": 8,
          "query_side": "target", "key_side": "target",
          "rules": ["causal", "window", "segments", "explicit"], "row_checks": ROW_CHECKS}],
        [{"name": "target", "len": 6, "first_tokens": [], "padding": 0}])

    # 4. a directory of NPY files, one per layer: a KV-cache decode step (1 query over 7 keys)
    pd = os.path.join(d, "decode_step")
    os.makedirs(os.path.join(pd, "decoder", "attn"))
    os.makedirs(os.path.join(pd, "tokens"))
    for l in range(3):
        a = softmax_rows(grid((2, 1, 7), 2.0, 0.3 * l), np.ones((1, 7), bool)).astype("<f4")
        np.save(os.path.join(pd, "decoder", "attn", "%d.npy" % l), a)
    np.save(os.path.join(pd, "tokens", "target.npy"), np.array(["a", "b", "c", "d", "e", "f", "g"]))
    np.save(os.path.join(pd, "meta.npy"), np.array(json.dumps(
        {"format": "heed-export/1", "blocks": {"decoder": {"kind": "causal", "query": "target", "key": "target"}}})))
    expects["decode_step"] = info_expect(
        [{"name": "decoder", "kind": "causal", "dtype": "f32", "layers": 3, "batch": 1, "heads": 2, "queries": 1,
          "keys": 7, "query_offset": 6, "grad": False, "allow": False, "valid": False, "segments": False, "out": False,
          "query_side": "target", "key_side": "target", "rules": ["causal"], "row_checks": ROW_CHECKS}],
        [{"name": "target", "len": 7, "first_tokens": ["a", "b", "c", "d", "e", "f", "g"], "padding": 0}])

    # 5. a lone .npy without metadata: block named after the file; nobody
    #    said the kind and every row has mass after its query's position (a
    #    softmax over all keys), so heed infers it bidirectional and says so
    np.save(os.path.join(d, "lone.npy"), softmax_rows(grid((3, 4, 4)), np.ones((4, 4), bool)).astype("<f8"))
    expects["lone.npy"] = info_expect(
        [{"name": "lone", "kind": "bidirectional", "kind_from": "inferred", "axes_from": "rank", "dtype": "f64", "layers": 1, "batch": 1, "heads": 3, "queries": 4, "keys": 4,
          "query_offset": 0, "grad": False, "allow": False, "valid": False, "segments": False, "out": False,
          "query_side": "", "key_side": "", "rules": [], "row_checks": ROW_CHECKS}], [])

    # 6. HDF5 without meta: block settings from dataset attributes, key-major axes
    a = softmax_rows(grid((2, 3, 5, 5)), causal(5, 5)).astype("<f4")
    with h5py.File(os.path.join(d, "attrs.h5"), "w") as f:
        ds = f.create_dataset("dec/attn", data=np.ascontiguousarray(np.swapaxes(a, -1, -2)))
        ds.attrs["kind"] = "causal"
        ds.attrs["axes"] = "layer head key query"
        ds.attrs["prefix"] = np.int64(2)
    expects["attrs.h5"] = info_expect(
        [{"name": "dec", "kind": "causal", "dtype": "f32", "layers": 2, "batch": 1, "heads": 3, "queries": 5, "keys": 5,
          "prefix": 2, "query_offset": 0, "grad": False, "allow": False, "valid": False, "segments": False, "out": False,
          "query_side": "", "key_side": "", "rules": ["causal", "prefix"], "row_checks": ROW_CHECKS + ["cut"]}], [])

    # 7. zip64-forced, deflated (same export as 1)
    shutil.copy(os.path.join(out, "npz", "zip64.npz"), os.path.join(d, "causal_zip64.npz"))
    expects["causal_zip64.npz"] = expects["causal.npz"]

    write_json(os.path.join(d, "expect.json"), expects)
    # values of a few heads, as numpy / h5py read them, for the Go tests of ReadAttn
    heads = []
    for rel, block, arr, loader in [
        ("causal.npz", "decoder", "decoder/attn", lambda: np.load(os.path.join(d, "causal.npz"))["decoder/attn"]),
        ("encdec.h5", "cross", "cross/attn", lambda: h5py.File(os.path.join(d, "encdec.h5"), "r")["cross/attn"][()]),
    ]:
        a = loader()
        for l, b, h in [(0, 0, 0), (1, a.shape[1] - 1, 1)]:
            heads.append({"file": rel, "block": block, "layer": l, "batch": b, "head": h,
                          "f32_bits": ["%08x" % v for v in f32_bits(a[l, b, h]).tolist()]})
    # key-major storage: heed must transpose back
    a = h5py.File(os.path.join(d, "attrs.h5"), "r")["dec/attn"][()]
    heads.append({"file": "attrs.h5", "block": "dec", "layer": 1, "batch": 0, "head": 2,
                  "f32_bits": ["%08x" % v for v in f32_bits(np.swapaxes(a, -1, -2)[1, 2]).tolist()]})
    for l in [0, 2]:
        a = np.load(os.path.join(pd, "decoder", "attn", "%d.npy" % l))
        heads.append({"file": "decode_step", "block": "decoder", "layer": l, "batch": 0, "head": 1,
                      "f32_bits": ["%08x" % v for v in f32_bits(a[1]).tolist()]})
    st, _ = read_safetensors(os.path.join(d, "gqa.safetensors"))
    heads.append({"file": "gqa.safetensors", "block": "decoder", "layer": 1, "batch": 0, "head": 3,
                  "f32_bits": ["%08x" % v for v in f32_bits(bf16_to_f32_torch(st["decoder/attn/1"][1][0, 3])).tolist()]})
    write_json(os.path.join(d, "heads.json"), heads)
    return []


# ---------------------------------------------------------------- conversions

def gen_conv(out):
    d = os.path.join(out, "conv")
    os.makedirs(d)
    bits = np.arange(65536, dtype=np.uint32).astype(np.uint16)
    # numpy's float16 -> float32 conversion of every bit pattern
    f16 = bits.view(np.float16).astype(np.float32).view(np.uint32)
    np.savez_compressed(os.path.join(d, "f16_to_f32_numpy.npz"), f32_bits=f16)
    # PyTorch's bfloat16 -> float32 conversion of every bit pattern
    bf = bf16_to_f32_torch(bits).view(np.uint32)
    np.savez_compressed(os.path.join(d, "bf16_to_f32_torch.npz"), f32_bits=bf)
    write_json(os.path.join(d, "conv.json"), {
        "f16_to_f32_numpy.npz": {"numpy": np.__version__, "crc32": zlib.crc32(f16.astype("<u4").tobytes())},
        "bf16_to_f32_torch.npz": {"torch": torch.__version__.split("+")[0].split("a")[0],
                                  "crc32": zlib.crc32(bf.astype("<u4").tobytes())}})
    return []


# ---------------------------------------------------------------- bad inputs

def npy_bytes(a, version=(1, 0)):
    import io
    b = io.BytesIO()
    np.lib.format.write_array(b, a, version=version, allow_pickle=True)
    return b.getvalue()


def npy_with_header(hdr_dict_text, data=b"", version=1):
    h = hdr_dict_text.encode("latin1")
    pre = len(b"\x93NUMPY") + 2 + (2 if version == 1 else 4)
    pad = (64 - (pre + len(h) + 1) % 64) % 64
    h = h + b" " * pad + b"\n"
    if version == 1:
        return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(h)) + h + data
    return b"\x93NUMPY\x02\x00" + struct.pack("<I", len(h)) + h + data


def torch_np(t):
    """A tensor as numpy for report_array: bfloat16 through torch's own
    conversion to float32."""
    if t.dtype == torch.bfloat16:
        return t.float().numpy(), "bf16"
    return t.numpy(), None


def torch_report(path, rel):
    """What torch.load (weights only: tensors, lists, dicts, strings) reports
    about a torch.save fixture, named as heed names it (README)."""
    obj = torch.load(path)
    stem = os.path.splitext(os.path.basename(path))[0]
    arrays, meta = [], None

    def tensor(name, t):
        a, heed = torch_np(t.contiguous())
        arrays.append(report_array(name, a, heed=heed, source_dtype=str(t.dtype)))

    def walk(prefix, v):
        nonlocal meta
        if isinstance(v, torch.Tensor):
            tensor(prefix, v)
        elif isinstance(v, str):
            if prefix == "meta":
                meta = v
            else:
                arrays.append(report_array(prefix, np.array(v)))
        elif isinstance(v, dict):
            for k in sorted(v):
                walk(k if not prefix else prefix + "/" + k, v[k])
        elif isinstance(v, (list, tuple)) and v and all(isinstance(x, torch.Tensor) for x in v):
            for i, x in enumerate(v):
                tensor(prefix + "/" + str(i), x)
        else:
            arrays.append(report_array(prefix, np.array(v, dtype=str)))

    if isinstance(obj, torch.Tensor):
        tensor(stem, obj)
    elif isinstance(obj, (list, tuple)):
        for i, x in enumerate(obj):
            tensor(stem + "." + str(i), x)
    else:
        walk("", obj)
    arrays.sort(key=lambda r: r["name"])
    return {"file": rel, "format": "torch", "meta": meta, "arrays": arrays}


def gen_torch(out):
    """torch.save fixtures (the zip format of torch >= 1.6). torch.save's
    bytes are not compared (the archive embeds its file name); --check
    compares what torch.load reports (torch_report)."""
    d = os.path.join(out, "torch")
    os.makedirs(d)
    a = torch.tensor(softmax_rows(grid((2, 3, 4, 4)), causal(4, 4)).astype("<f4"))
    saves = {
        "f32.pt": a,
        "f16.pt": a.half(),
        "bf16.pt": a.bfloat16(),
        "f64.pth": a.double()[0],
        "layers.pt": [a[0], a[1]],
        "transposed.pt": a[0, 0].t(),  # a Fortran-order view of its storage
        "view.pt": a[1],  # a view at a storage offset: the whole storage is saved
        "dict.pt": {"decoder/attn": [a[0][None], a[1][None]], "tokens/target": [["w0", "w1", "w2", "w3"]],
                    "valid/target": torch.tensor([[1, 1, 1, 0]], dtype=torch.int8),
                    "meta": json.dumps({"format": "heed-export/1", "blocks": {"decoder": {
                        "kind": "causal", "query": "target", "key": "target", "axes": "batch head query key"}}})},
        "ints.pt": {"valid/t": torch.tensor([[1, 0], [1, 1]], dtype=torch.bool),
                    "segments/t": torch.tensor([[0, 1], [2, 3]], dtype=torch.int64),
                    "x/attn": torch.ones(2, 2, dtype=torch.float32) / 2},
    }
    leak = a.clone()
    leak[1, 2, 1, 3] = 0.25  # query 1 sees key 3: a causal leak at +2
    saves["leak.pt"] = {"decoder/attn": leak, "meta": json.dumps({"format": "heed-export/1", "blocks": {
        "decoder": {"kind": "causal", "axes": "layer head query key"}}})}
    for name, obj in saves.items():
        p = os.path.join(d, name)
        torch.save(obj, p)
        write_json(os.path.splitext(p)[0] + ".json", torch_report(p, "torch/" + name))


def gen_bad(out):
    d = os.path.join(out, "bad")
    os.makedirs(d)

    def w(name, data):
        with open(os.path.join(d, name), "wb") as f:
            f.write(data)

    good = npy_bytes(grid((4, 4)).astype("<f4"))
    w("truncated_data.npy", good[:-5])
    w("truncated_header.npy", good[:30])
    w("lying_shape.npy", npy_with_header("{'descr': '<f4', 'fortran_order': False, 'shape': (100, 100), }", b"\0" * 64))
    w("unknown_dtype.npy", npy_with_header("{'descr': '<q7', 'fortran_order': False, 'shape': (2,), }", b"\0" * 14))
    w("complex.npy", npy_with_header("{'descr': '<c8', 'fortran_order': False, 'shape': (2,), }", b"\0" * 16))
    # an object array as numpy writes one with allow_pickle=True (a pickle follows the header)
    w("object.npy", npy_bytes(np.array(["a", 1], dtype=object)))
    w("huge_header.npy", b"\x93NUMPY\x02\x00" + struct.pack("<I", 2 ** 31) + b"{")
    w("bad_version.npy", b"\x93NUMPY\x09\x00" + good[8:])
    w("overflow_shape.npy", npy_with_header("{'descr': '<f8', 'fortran_order': False, 'shape': (4294967296, 4294967296, 4294967296), }"))
    w("many_empty_strings.npy", npy_with_header("{'descr': '<U0', 'fortran_order': False, 'shape': (1125899906842624,), }"))

    # attn/grad shapes disagree; tokens of the wrong length
    np.savez(os.path.join(d, "grad_mismatch.npz"), **{"decoder/attn": grid((2, 3, 4, 4)).astype("<f4"),
                                                    "decoder/grad": grid((2, 3, 4, 5)).astype("<f4")})
    meta = json.dumps({"format": "heed-export/1", "blocks": {"decoder": {"kind": "causal", "query": "target", "key": "target"}}})
    np.savez(os.path.join(d, "tokens_length.npz"), **{"decoder/attn": grid((2, 3, 4, 4)).astype("<f4"),
                                                    "tokens/target": np.array(["a", "b", "c"]), "meta": np.array(meta)})
    np.savez(os.path.join(d, "bad_meta.npz"), **{"decoder/attn": grid((2, 3, 4, 4)).astype("<f4"), "meta": np.array("{not json")})
    # a deflated member whose NPY header claims far more than its bytes can inflate to
    import io
    zb = io.BytesIO()
    with zipfile.ZipFile(zb, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr(zipfile.ZipInfo("x.npy", date_time=(1980, 1, 1, 0, 0, 0)), npy_with_header("{'descr': '<f4', 'fortran_order': False, 'shape': (1000000, 1000000), }", b"\0" * 64), compress_type=zipfile.ZIP_DEFLATED)
    w("deflate_bomb.npz", zb.getvalue())
    w("truncated.npz", open(os.path.join(out, "npz", "stored.npz"), "rb").read()[:300])
    w("not_hdf5.h5", b"this is a text file, not HDF5\n")
    h5 = open(os.path.join(out, "hdf5", "types.h5"), "rb").read()
    w("truncated.h5", h5[:len(h5) // 3])
    # a dataset created but never written (the writing job died before its
    # first write): h5py allocates no storage, so the file stays tiny whatever
    # the shape, and reading it would give fill values for ever
    with h5py.File(os.path.join(d, "h5_unwritten.h5"), "w") as f:
        f.create_dataset("decoder/attn", shape=(32, 32, 4096, 4096), dtype="f2")

    # safetensors
    hdr = b'{"x":{"dtype":"F32","shape":[2],"data_offsets":[0,8]}}'
    w("st_huge_header.safetensors", struct.pack("<Q", 2 ** 62) + hdr + b"\0" * 8)
    w("st_truncated.safetensors", struct.pack("<Q", len(hdr)) + hdr + b"\0" * 5)
    w("st_short.safetensors", b"\x05\x00\x00")
    gap = b'{"x":{"dtype":"F32","shape":[1],"data_offsets":[4,8]}}'
    w("st_gap.safetensors", struct.pack("<Q", len(gap)) + gap + b"\0" * 8)
    lie = b'{"x":{"dtype":"F32","shape":[3],"data_offsets":[0,8]}}'
    w("st_shape_lie.safetensors", struct.pack("<Q", len(lie)) + lie + b"\0" * 8)
    unk = b'{"x":{"dtype":"Q4","shape":[2],"data_offsets":[0,8]}}'
    w("st_unknown_dtype.safetensors", struct.pack("<Q", len(unk)) + unk + b"\0" * 8)
    notjson = b'{"x": [1, 2'
    w("st_bad_json.safetensors", struct.pack("<Q", len(notjson)) + notjson)
    w("unknown_format.bin", b"GIF89a...")

    # torch.save archives with a hostile or broken pickle, written byte by
    # byte with the opcodes of Python's pickletools documentation (never
    # unpickled here): GLOBAL 'posix system' then REDUCE, which pickle.load
    # would run; a class of the saving program; a pickle whose BINUNICODE8
    # claims 2^62 bytes; a storage member shorter than its tensor.
    def torch_zip(name, pkl, members=()):
        buf = io.BytesIO()
        with zipfile.ZipFile(buf, "w", zipfile.ZIP_STORED) as z:
            z.writestr(zipfile.ZipInfo(name + "/data.pkl", (1980, 1, 1, 0, 0, 0)), pkl)
            for m, data in members:
                z.writestr(zipfile.ZipInfo(name + "/" + m, (1980, 1, 1, 0, 0, 0)), data)
            z.writestr(zipfile.ZipInfo(name + "/version", (1980, 1, 1, 0, 0, 0)), b"3\n")
        w(name + ".pt", buf.getvalue())

    torch_zip("torch_system", b"\x80\x02cposix\nsystem\nq\x00X\x04\x00\x00\x00echoq\x01\x85q\x02Rq\x03.")
    torch_zip("torch_custom", b"\x80\x02c__main__\nThing\nq\x00)\x81q\x01.")
    torch_zip("torch_huge_string", b"\x80\x04\x8d" + (1 << 62).to_bytes(8, "little") + b"abc.")
    # _rebuild_tensor_v2(('storage', torch.FloatStorage, '0', 'cpu', 16), 0, (4, 4), (4, 1), False, OrderedDict())
    rebuild = (b"\x80\x02ctorch._utils\n_rebuild_tensor_v2\nq\x00((X\x07\x00\x00\x00storageq\x01ctorch\nFloatStorage\nq\x02"
               b"X\x01\x00\x00\x000q\x03X\x03\x00\x00\x00cpuq\x04K\x10tq\x05QK\x00K\x04K\x04\x86q\x06K\x04K\x01\x86q\x07"
               b"\x89ccollections\nOrderedDict\nq\x08)Rq\ttq\nRq\x0b.")
    torch_zip("torch_short_storage", rebuild, [("data/0", b"\0" * 40)])
    torch_zip("torch_no_storage", rebuild)
    # the legacy (pre-1.6) torch.save format: a pickle stream, not a zip
    torch.save(torch.ones(2, 2), os.path.join(d, "torch_legacy.pt"), _use_new_zipfile_serialization=False)
    return []


# ---------------------------------------------------------------- main

def generate(out):
    if os.path.exists(out):
        shutil.rmtree(out)
    os.makedirs(out)
    gen_npy(out)
    gen_npz(out)
    gen_safetensors(out)
    gen_hdf5(out)
    gen_torch(out)
    gen_exports(out)
    gen_conv(out)
    gen_bad(out)


DETERMINISTIC = (".npy", ".safetensors", ".json", ".bin")


def reread(base):
    """Have numpy / h5py read the files under base and report them again."""
    out = {}
    for sub, fn in [("npy", None), ("npz", npz_report), ("safetensors", st_report), ("hdf5", h5_report),
                    ("torch", torch_report)]:
        d = os.path.join(base, sub)
        for name in sorted(os.listdir(d)):
            if name.endswith(".json"):
                continue
            rel = sub + "/" + name
            path = os.path.join(d, name)
            if sub == "npy":
                a = np.load(path, allow_pickle=False)
                out[rel] = report_array(os.path.splitext(name)[0], a)
            else:
                out[rel] = fn(path, rel)
    return out


def check():
    problems = []
    with tempfile.TemporaryDirectory() as tmp:
        fresh = os.path.join(tmp, "fixtures")
        generate(fresh)
        for root, _, files in os.walk(fresh):
            for name in sorted(files):
                p = os.path.join(root, name)
                rel = os.path.relpath(p, fresh)
                c = os.path.join(DEFAULT_OUT, rel)
                if not os.path.exists(c):
                    problems.append("missing from the committed fixtures: " + rel)
                    continue
                if name.endswith(DETERMINISTIC):
                    if open(p, "rb").read() != open(c, "rb").read():
                        problems.append("differs from a fresh generation: " + rel)
        for root, _, files in os.walk(DEFAULT_OUT):
            for name in files:
                rel = os.path.relpath(os.path.join(root, name), DEFAULT_OUT)
                if not os.path.exists(os.path.join(fresh, rel)):
                    problems.append("committed but no longer generated: " + rel)
        a, b = reread(fresh), reread(DEFAULT_OUT)
        for rel in sorted(set(a) | set(b)):
            ra, rb = a.get(rel), b.get(rel)
            if ra is not None and rb is not None:
                ra, rb = dict(ra) if isinstance(ra, dict) else ra, dict(rb) if isinstance(rb, dict) else rb
                for r in (ra, rb):
                    if isinstance(r, dict):
                        r.pop("file", None)
            if ra != rb:
                problems.append("numpy/h5py now read %s differently from the committed file" % rel)
    for p in problems:
        print("gen_fixtures --check: " + p, file=sys.stderr)
    if problems:
        print("gen_fixtures --check: %d problems; if the change is expected, rerun without --check and commit" % len(problems), file=sys.stderr)
        return 1
    print("gen_fixtures --check: committed fixtures match numpy %s, h5py %s (HDF5 %s), torch %s" %
          (np.__version__, h5py.__version__, h5py.version.hdf5_version, torch.__version__))
    return 0


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--check", action="store_true", help="regenerate in a temporary directory and compare with the committed fixtures")
    ap.add_argument("--out", default=DEFAULT_OUT, help="output directory (default: testdata/fixtures)")
    args = ap.parse_args()
    if args.check:
        sys.exit(check())
    generate(args.out)
    total = sum(os.path.getsize(os.path.join(r, f)) for r, _, fs in os.walk(args.out) for f in fs)
    print("wrote %s (%d bytes)" % (args.out, total))


if __name__ == "__main__":
    main()
