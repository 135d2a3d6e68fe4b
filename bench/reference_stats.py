#!/usr/bin/env python3
"""Per-head attention statistics with plain numpy: the baseline heed is timed against.

A straightforward script, as an engineer would write it: the export is
memory-mapped with numpy, each layer converted to float32 and reduced with
vectorised numpy calls (no Python loop over rows). Per (layer, head) it
computes, over every query row:

  entropy       mean_q  -sum_k A ln A, with 0 ln 0 = 0 (nats)
                (Clark, Khandelwal, Levy & Manning 2019, "What Does BERT Look At?", sec. 3.3)
  entropy_norm  mean_q  H_q / ln n_q, n_q = q + 1 keys allowed by the causal rule; n_q = 1 -> 0
                (common practice)
  confidence    mean_q  max_k A (Voita et al. 2019, ACL, sec. 4)
  distance      mean_q  sum_k A |q - k| (Dosovitskiy et al. 2021, ViT, appendix D.7, for text)
  leak_mass     sum over k > q of A: mass the causal rule forbids (common practice)

Reads `decoder/attn` [layers, heads, query, key] from a safetensors file
(format: its README; header parsed here with json) or a bare .npy
[layers, heads, query, key]. Prints JSON {"heads": [{layer, head, ...}]}.
Run with Debian's /usr/bin/python3.
"""

import json
import struct
import sys

import numpy as np


def open_attn(path):
    if path.endswith(".npy"):
        return np.load(path, mmap_mode="r")
    with open(path, "rb") as f:
        n = struct.unpack("<Q", f.read(8))[0]
        header = json.loads(f.read(n))
    t = header["decoder/attn"]
    dtype = {"F16": "<f2", "F32": "<f4", "F64": "<f8"}[t["dtype"]]
    begin, _ = t["data_offsets"]
    return np.memmap(path, dtype=dtype, mode="r", offset=8 + n + begin, shape=tuple(t["shape"]))


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: reference_stats.py EXPORT.safetensors|EXPORT.npy")
    attn = open_attn(sys.argv[1])
    layers, heads, nq, nk = attn.shape
    q = np.arange(nq)[:, None]
    k = np.arange(nk)[None, :]
    dist = np.abs(q - k).astype(np.float32)
    forbidden = k > q
    lnn = np.log(np.arange(1, nq + 1, dtype=np.float64))
    lnn[0] = 1.0  # n_q = 1: H_q is 0, and so is the normalised value

    out = []
    for layer in range(layers):
        a = np.asarray(attn[layer], dtype=np.float32)  # [heads, q, k]
        logs = np.zeros_like(a)
        np.log(a, out=logs, where=a > 0)
        ent_rows = -(a * logs).sum(axis=-1, dtype=np.float64)  # [heads, q]
        conf = a.max(axis=-1).mean(axis=-1, dtype=np.float64)
        distance = (a * dist).sum(axis=-1, dtype=np.float64).mean(axis=-1)
        leak = np.where(forbidden, a, 0).sum(axis=(-1, -2), dtype=np.float64)
        for h in range(heads):
            out.append({
                "layer": layer, "head": h,
                "entropy": float(ent_rows[h].mean()),
                "entropy_norm": float((ent_rows[h] / lnn).mean()),
                "confidence": float(conf[h]),
                "distance": float(distance[h]),
                "leak_mass": float(leak[h]),
            })
    json.dump({"heads": out}, sys.stdout)
    sys.stdout.write("\n")


if __name__ == "__main__":
    main()
