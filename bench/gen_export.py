#!/usr/bin/env python3
"""Write a seeded float16 causal attention export for heed's benchmarks.

The file is a safetensors container in the heed-export/1 convention: one
tensor `decoder/attn` of shape [layers, heads, seq, seq] (axes "layer head
query key"), F16, with the block's metadata (kind causal) in the
`__metadata__` entry `meta`.

Every row is a softmax over the keys its query may see (k <= q) and exactly
zero elsewhere, computed in float32 and rounded to float16 once, as a model
running in half precision would export it. Heads differ on purpose, so the
statistics are not all alike: a temperature per head, some heads that look
at the previous token (positional), some that sink on key 0.

The safetensors layout is written by hand from the format's specification
(its README: u64 little-endian header size N, N bytes of JSON padded with
spaces to a multiple of 8, then the raw little-endian C-order data), one
layer at a time, so memory stays at about one layer whatever the size.

Usage: gen_export.py OUT.safetensors [--layers 12] [--heads 12] [--seq 1024] [--seed 7]
The file is written to OUT.tmp and renamed, so an interrupted run leaves no
half file behind. Run with Debian's /usr/bin/python3 (numpy).
"""

import argparse
import json
import os
import shutil
import struct
import sys

import numpy as np


def layer_attn(rng, heads, seq, layer):
    """One layer's [heads, seq, seq] causal softmax in float32."""
    q = np.arange(seq)
    blocked = q[None, :] > q[:, None]  # k > q: the causal rule
    out = np.empty((heads, seq, seq), dtype=np.float32)
    for h in range(heads):
        # A temperature per head: from nearly uniform rows to peaked ones.
        scale = 0.25 + 3.0 * ((layer * heads + h) % 7) / 6.0
        logits = rng.standard_normal((seq, seq), dtype=np.float32) * np.float32(scale)
        kind = (layer + 2 * h) % 5
        if kind == 0:  # positional head: the previous token
            logits[q[1:], q[1:] - 1] += np.float32(6.0)
        elif kind == 1:  # sink head: key 0
            logits[:, 0] += np.float32(5.0)
        logits[blocked] = -np.inf
        logits -= logits.max(axis=1, keepdims=True)
        np.exp(logits, out=logits)
        logits /= logits.sum(axis=1, keepdims=True)
        out[h] = logits
    return out


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("out")
    ap.add_argument("--layers", type=int, default=12)
    ap.add_argument("--heads", type=int, default=12)
    ap.add_argument("--seq", type=int, default=1024)
    ap.add_argument("--seed", type=int, default=7)
    a = ap.parse_args()

    shape = [a.layers, a.heads, a.seq, a.seq]
    nbytes = a.layers * a.heads * a.seq * a.seq * 2
    meta = {
        "format": "heed-export/1",
        "blocks": {"decoder": {"kind": "causal", "query": "target", "key": "target",
                               "axes": "layer head query key"}},
    }
    header = {
        "__metadata__": {"meta": json.dumps(meta, separators=(",", ":")),
                         "generator": "heed bench/gen_export.py seed=%d" % a.seed},
        "decoder/attn": {"dtype": "F16", "shape": shape, "data_offsets": [0, nbytes]},
    }
    hj = json.dumps(header, separators=(",", ":")).encode()
    hj += b" " * (-len(hj) % 8)

    outdir = os.path.dirname(os.path.abspath(a.out))
    free = shutil.disk_usage(outdir).free
    need = nbytes + 8 + len(hj) + (256 << 20)  # and a margin
    if free < need:
        sys.exit("gen_export.py: %s has %.1f GB free, need %.1f GB" % (outdir, free / 1e9, need / 1e9))

    rng = np.random.default_rng(a.seed)
    tmp = a.out + ".tmp"
    with open(tmp, "wb") as f:
        f.write(struct.pack("<Q", len(hj)))
        f.write(hj)
        for layer in range(a.layers):
            f.write(layer_attn(rng, a.heads, a.seq, layer).astype("<f2").tobytes())
    if os.path.getsize(tmp) != 8 + len(hj) + nbytes:
        sys.exit("gen_export.py: %s has the wrong size" % tmp)
    os.replace(tmp, a.out)
    print("gen_export.py: wrote %s: decoder/attn %s f16, %.2f GB" % (a.out, shape, (8 + len(hj) + nbytes) / 1e9),
          file=sys.stderr)


if __name__ == "__main__":
    main()
