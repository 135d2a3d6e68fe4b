#!/usr/bin/env python3
"""Write one seeded float16 causal attention array in every container heed reads.

For the loader's read benchmarks (loader/read_bench_test.go): the same array
`decoder/attn` [layers, heads, seq, seq] (axes "layer head query key"), rows
softmax-normalised over k <= q, saved as

  attn.npy                 bare NPY (numpy.save)
  attn_stored.npz          numpy.savez (ZIP_STORED members)
  attn_deflated.npz        numpy.savez_compressed (ZIP_DEFLATED members)
  attn.safetensors         safetensors, written by hand from its README
  attn.h5                  h5py, contiguous dataset
  attn_chunked.h5          h5py, one chunk per head, gzip level 4

each with the heed-export/1 metadata (kind causal) where the container has a
place for it. Usage: gen_containers.py OUTDIR [--layers 2] [--heads 4] [--seq 1024] [--seed 7]
Run with Debian's /usr/bin/python3 (numpy, h5py).
"""

import argparse
import json
import os
import struct

import numpy as np

import h5py


def causal_softmax(rng, layers, heads, seq):
    q = np.arange(seq)
    blocked = q[None, :] > q[:, None]
    out = np.empty((layers, heads, seq, seq), dtype=np.float16)
    for l in range(layers):
        for h in range(heads):
            x = rng.standard_normal((seq, seq), dtype=np.float32) * np.float32(0.5 + h)
            x[blocked] = -np.inf
            x -= x.max(axis=1, keepdims=True)
            np.exp(x, out=x)
            x /= x.sum(axis=1, keepdims=True)
            out[l, h] = x
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("outdir")
    ap.add_argument("--layers", type=int, default=2)
    ap.add_argument("--heads", type=int, default=4)
    ap.add_argument("--seq", type=int, default=1024)
    ap.add_argument("--seed", type=int, default=7)
    a = ap.parse_args()
    os.makedirs(a.outdir, exist_ok=True)
    attn = causal_softmax(np.random.default_rng(a.seed), a.layers, a.heads, a.seq)
    meta = json.dumps({"format": "heed-export/1",
                       "blocks": {"decoder": {"kind": "causal", "query": "target", "key": "target",
                                              "axes": "layer head query key"}}})
    p = lambda name: os.path.join(a.outdir, name)

    np.save(p("attn.npy"), attn)
    np.savez(p("attn_stored.npz"), **{"decoder/attn": attn, "meta": np.array(meta)})
    np.savez_compressed(p("attn_deflated.npz"), **{"decoder/attn": attn, "meta": np.array(meta)})

    data = attn.astype("<f2").tobytes()
    header = {"__metadata__": {"meta": meta},
              "decoder/attn": {"dtype": "F16", "shape": list(attn.shape), "data_offsets": [0, len(data)]}}
    hj = json.dumps(header).encode()
    hj += b" " * (-len(hj) % 8)
    with open(p("attn.safetensors"), "wb") as f:
        f.write(struct.pack("<Q", len(hj)) + hj + data)

    with h5py.File(p("attn.h5"), "w") as f:
        f.attrs["meta"] = meta
        f.create_dataset("decoder/attn", data=attn)
    with h5py.File(p("attn_chunked.h5"), "w") as f:
        f.attrs["meta"] = meta
        f.create_dataset("decoder/attn", data=attn, chunks=(1, 1, a.seq, a.seq), compression="gzip",
                         compression_opts=4)


if __name__ == "__main__":
    main()
