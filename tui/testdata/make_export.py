# Writes small heed-export/1 NPZ files for the TUI tests (run with /usr/bin/python3).
#
#   make_export.py OUT.npz [--leak] [--layers L] [--heads H] [--seq N] [--batch B] [--seed S]
#
# Probabilities are numpy softmaxes of seeded random scores under a causal
# mask (numpy.triu(..., k=1) blocked, the PyTorch convention of
# generate_square_subsequent_mask); --leak builds the last layer's mask with
# k=2, the "wrong triu offset" bug, so every query also sees the next key.
import argparse
import json

import numpy as np

WORDS = ["<s>", "The", " quiet", " river", " bends", " past", " the", " old", " mill", ",",
         " then", " it", " widens", " into", " a", " lake", ".", " Birds", " rest", " there"]

ap = argparse.ArgumentParser()
ap.add_argument("out")
ap.add_argument("--leak", action="store_true")
ap.add_argument("--layers", type=int, default=2)
ap.add_argument("--heads", type=int, default=4)
ap.add_argument("--seq", type=int, default=16)
ap.add_argument("--batch", type=int, default=1)
ap.add_argument("--seed", type=int, default=7)
a = ap.parse_args()

rng = np.random.default_rng(a.seed)
L, B, H, N = a.layers, a.batch, a.heads, a.seq
scores = rng.normal(size=(L, B, H, N, N)) * 2.0
attn = np.empty_like(scores)
for l in range(L):
    off = 2 if (a.leak and l == L - 1) else 1
    blocked = np.triu(np.ones((N, N), dtype=bool), k=off)
    s = np.where(blocked, -np.inf, scores[l])
    s = s - s.max(axis=-1, keepdims=True)
    e = np.exp(s)
    attn[l] = e / e.sum(axis=-1, keepdims=True)
tokens = np.array([WORDS[i % len(WORDS)] for i in range(N)])
meta = {"format": "heed-export/1",
        "blocks": {"decoder": {"kind": "causal", "query": "target", "key": "target",
                               "axes": "layer batch head query key"}}}
np.savez(a.out, **{"decoder/attn": attn.astype(np.float32), "tokens/target": tokens,
                   "meta": np.array(json.dumps(meta))})
