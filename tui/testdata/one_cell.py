#!/usr/bin/python3
# Writes OUT.npz: a 12 x 12-head causal export of 300 tokens (float16, rows
# softmax-normalised over the allowed keys from seeded normal scores) whose
# one leaking cell is layer 7, head 5, query 150, key 201 (weight 0.01).
# Used by the tui flows and the e2e tests: one leaking cell in many heads.
#   one_cell.py OUT.npz
import json
import sys

import numpy as np

rng = np.random.default_rng(3)
L, H, T = 12, 12, 300
s = rng.normal(size=(L, 1, H, T, T)).astype(np.float32)
s[..., np.triu(np.ones((T, T), dtype=bool), k=1)] = -np.inf
a = np.exp(s - s.max(-1, keepdims=True)); a /= a.sum(-1, keepdims=True)
a[7, 0, 5, 150, :151] *= 0.99; a[7, 0, 5, 150, 201] = 0.01
meta = {"format": "heed-export/1", "blocks": {"decoder": {"kind": "causal", "axes": "layer batch head query key"}}}
np.savez(sys.argv[1], **{"decoder/attn": a.astype(np.float16), "meta": np.array(json.dumps(meta))})
