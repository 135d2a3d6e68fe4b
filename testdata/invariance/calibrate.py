"""Measures how much two forward passes of a *correct* causal model differ at
positions before P, per dtype, on this CPU: the rounding noise heed's
invariance tolerance must stay above. Prints one line per (dtype, size,
scenario) with the largest |a - b| / rms, where rms is the root mean square
of that layer's activations at the compared positions (the same scale heed
uses), over all layers, batch items and features.

Scenarios: "suffix" (same shape, tokens from P on replaced), "prefix" (the
second pass sees only the first P tokens: other matrix shapes), "batch" (the
item run alone vs inside a batch of 4: other batch shape).

Usage: /usr/bin/python3 testdata/invariance/calibrate.py
"""

import os
import sys

import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import model as M  # noqa: E402


def worst(a, b):
    """max over layers of max |a-b| / (|b| + rms(a)) at the compared positions."""
    r = 0.0
    for la, lb in zip(a, b):
        la, lb = la.double(), lb.double()
        rms = max(la.pow(2).mean().sqrt().item(), 1e-30)
        r = max(r, ((la - lb).abs() / (lb.abs() + rms)).max().item())
    return r


def main():
  for threads in (1, 2):
    torch.set_num_threads(threads)
    for dtype in (torch.float64, torch.float32, torch.bfloat16):
        for (d, heads, layers, n) in ((16, 4, 4, 10), (64, 8, 6, 128), (256, 8, 4, 256)):
            torch.manual_seed(1)
            vocab = 50
            m = M.Stack(vocab, d=d, heads=heads, ff=4 * d, layers=layers, max_len=n).to(dtype).eval()
            ids = torch.randint(0, vocab, (4, n))
            P = n // 2
            other = ids.clone()
            other[:, P:] = (other[:, P:] + torch.randint(1, vocab, other[:, P:].shape)) % vocab
            out_a, log_a, _ = M.run(m, ids)
            out_b, log_b, _ = M.run(m, other)
            res = {"suffix": worst(out_a[:, :, :P], out_b[:, :, :P])}
            out_p, _, _ = M.run(m, ids[:, :P])
            res["prefix"] = worst(out_a[:, :, :P], out_p)
            out_1, _, _ = M.run(m, ids[:1])
            res["batch"] = worst(out_a[:, :1], out_1)
            eps = torch.finfo(dtype).eps
            print(f"threads={threads} {str(dtype):15s} d={d:3d} layers={layers} n={n:3d} eps={eps:.2e} " +
                  " ".join(f"{k}={v:.2e} ({v / eps:.1f} eps)" for k, v in res.items()))


if __name__ == "__main__":
    main()
