#!/usr/bin/python3
"""Generate heed's analysis test cases with PyTorch, numpy and scipy.

Run with Debian's /usr/bin/python3 (numpy, scipy, torch 1.13):

    /usr/bin/python3 testdata/cases/gen_cases.py           # (re)write testdata/cases/*.npz and expected.json
    /usr/bin/python3 testdata/cases/gen_cases.py --check   # regenerate in a temp dir and compare with what is committed

Each diagnosis case is a small model of torch.nn.MultiheadAttention layers
(eval mode, need_weights=True, average_attn_weights=False: per-head weights
[batch, heads, query, key], as its docstring says) run with a mask that has
one bug, and its correct twin run with the right mask. The expected findings
come from what this script broke: it compares the buggy mask with the correct
one and records the layers, heads, batch items and offsets k - q of the cells
it let through. Files are NPZ in the heed-export/1 convention (members
BLOCK/attn, valid/SIDE, segments/SIDE, tokens/SIDE, meta).

Reference values (expected.json "refs"):
  - scipy.stats.entropy (nats) per row, means over judged rows;
  - scipy.spatial.distance.jensenshannon, squared (it returns the square root
    of the divergence), mean over rows and over the layer's other heads;
  - attention rollout (Abnar & Zuidema 2020) with numpy matmul;
  - attention flow with scipy.sparse.csgraph.maximum_flow on capacities
    scaled to integers (1e6 per unit);
  - head importance from torch autograd: a tiny attention model with an
    explicit head mask xi multiplying each head's probabilities; dL/dxi from
    autograd must equal sum_{q,k} A * dL/dA computed from the export;
  - gradient-weighted relevance (Chefer, Gur & Wolf 2021) written in numpy
    from the paper's update rules, for a decoder-only and an encoder-decoder
    model (a second implementation of the same formulas, not an outside one).
"""
import argparse
import json
import os
import shutil
import sys
import tempfile

import numpy as np
import scipy.spatial.distance
import scipy.stats
import torch
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import maximum_flow

sys.dont_write_bytecode = True  # no __pycache__ beside the committed cases
from relevance import normbar  # noqa: E402 (this directory's module)

HERE = os.path.dirname(os.path.abspath(__file__))
TOL = 1e-6  # heed's default leak tolerance (analysis.DefaultTol)
E, H, B, T = 16, 4, 2, 12
WORDS = "the a cat sat on mat dog ran to park and then it slept there now".split()


def toks(n, off=0):
    return np.array([WORDS[(i + off) % len(WORDS)] + str(i) for i in range(n)])


def meta(blocks):
    return json.dumps({"format": "heed-export/1", "blocks": blocks})


def causal_blocked(n):
    return torch.triu(torch.ones(n, n, dtype=torch.bool), diagonal=1)


class MHAStack(torch.nn.Module):
    """Self-attention layers with residual and layer norm, one MHA each."""

    def __init__(self, layers, dropout=0.0):
        super().__init__()
        self.att = torch.nn.ModuleList(torch.nn.MultiheadAttention(E, H, dropout=dropout, batch_first=True) for _ in range(layers))
        self.norm = torch.nn.ModuleList(torch.nn.LayerNorm(E) for _ in range(layers))

    def forward(self, x, masks, kpm=None):
        out = []
        for l, (att, norm) in enumerate(zip(self.att, self.norm)):
            y, w = att(x, x, x, attn_mask=masks[l], key_padding_mask=kpm, need_weights=True, average_attn_weights=False)
            x = norm(x + y)
            out.append(w.detach())
        return torch.stack(out).numpy()  # [layer, batch, head, q, k]


def inputs(seed, b=B, t=T):
    g = torch.Generator().manual_seed(seed)
    return 1.5 * torch.randn(b, t, E, generator=g)


def per_head(mask_bh):
    """[B, H, q, k] bool (True = blocked) -> [B*H, q, k] as MHA wants (batch-major)."""
    b, h, q, k = mask_bh.shape
    return mask_bh.reshape(b * h, q, k)


def leaks(attn, forbidden, judged, rule, block, positional=True, qoff=0):
    """Expected finding: the units and offsets where forbidden cells carry mass.

    forbidden: [L, B, H, q, k] bool of the cells the bug let through that the rule forbids.
    judged: [B, q] bool. Cells at or below TOL are no leak by heed's definition
    and are left out; at least 90% of the broken cells must carry more than
    TOL, else the case would not test the bug."""
    L = attn.shape[0]
    units = set()
    offsets = {}
    cells = 0
    for l in range(L):
        for b in range(attn.shape[1]):
            for h in range(attn.shape[2]):
                m0 = forbidden[l, b, h] & judged[b][:, None]
                if not m0.any():
                    continue
                m = m0 & (attn[l, b, h] > TOL)
                assert m.sum() >= 0.9 * m0.sum(), (block, rule, l, b, h, int(m.sum()), int(m0.sum()))
                units.add((l, h, b))
                cells += int(m.sum())
                if positional:
                    qs, ks = np.nonzero(m)
                    for q, k in zip(qs, ks):
                        o = int(k - (q + qoff))
                        offsets[o] = offsets.get(o, 0) + 1
    return finding(block, rule, units, cells, offsets if positional else None)


def finding(block, rule, units, cells=None, offsets=None, rows=None):
    ls = sorted({u[0] for u in units})
    hs = sorted({u[1] for u in units})
    bs = sorted({u[2] for u in units})
    assert len(units) == len(ls) * len(hs) * len(bs), "expected a product set"
    f = {"block": block, "rule": rule, "layer": ls, "head": hs, "batch": bs}
    if cells is not None:
        f["cells"] = cells
    if rows is not None:
        f["rows"] = rows
    if offsets is not None:
        f["offsets"] = [[o, offsets[o]] for o in sorted(offsets)]
    return f


def diag(pattern, block, f, value=None, tol=0.0):
    d = {"pattern": pattern, "block": block, "layer": f["layer"], "head": f["head"], "batch": f["batch"]}
    if value is not None:
        d["value"] = value
        d["value_tol"] = tol
    return d


def causal_meta(extra=None):
    b = {"kind": "causal", "query": "target", "key": "target", "axes": "layer batch head query key"}
    b.update(extra or {})
    return meta({"decoder": b})


def save(path, arrays):
    np.savez_compressed(path, **arrays)


# ---------------------------------------------------------------- diagnosis cases

def run_causal(seed, layers, masks, kpm=None, dropout=0.0, train=False, b=B, t=T):
    torch.manual_seed(seed)
    m = MHAStack(layers, dropout)
    m.train(train)
    with torch.no_grad():
        return m(inputs(seed + 1, b, t), masks, kpm)


def case_shift(out, seed):
    right = causal_blocked(T)
    bug = torch.triu(torch.ones(T, T, dtype=torch.bool), diagonal=2)  # one diagonal too many allowed
    cases = {}
    for name, mask in (("bad", bug), ("good", right)):
        a = run_causal(seed, 2, [mask, mask])
        cases[name] = {"decoder/attn": a.astype(np.float32), "tokens/target": toks(T), "meta": causal_meta()}
    a = cases["bad"]["decoder/attn"]
    forb = np.broadcast_to((right & ~bug).numpy(), a.shape)
    f = leaks(a, forb, np.ones((B, T), bool), "causal", "decoder")
    return cases, [f], [diag("mask_shifted", "decoder", f, 1)]


def case_shift_padded(out, seed):
    """The +1 shift on a short right-padded batch (lengths 12, 3, 5) with the
    key padding mask applied: the +1 key of each padded item's last real query
    is a padding key, blocked anyway, so it cannot show the shift."""
    b = 3
    lengths = [T, 3, 5]
    valid = np.arange(T)[None, :] < np.array(lengths)[:, None]
    kpm = torch.from_numpy(~valid)
    right = causal_blocked(T)
    bug = torch.triu(torch.ones(T, T, dtype=torch.bool), diagonal=2)
    cases = {}
    tokens = np.stack([np.where(valid[i], toks(T, i), "<pad>") for i in range(b)])
    for name, mask in (("bad", bug), ("good", right)):
        a = run_causal(seed, 2, [mask, mask], kpm=kpm, b=b)
        assert not np.isnan(a).any()
        cases[name] = {"decoder/attn": a.astype(np.float32), "valid/target": valid.astype(np.uint8),
                       "tokens/target": tokens, "meta": causal_meta()}
    a = cases["bad"]["decoder/attn"]
    # what the bug let through: k = q+1 at real keys (padding keys stay blocked)
    shifted = (right & ~bug).numpy()[None, :, :] & valid[:, None, :]  # [batch, q, k]
    forb = np.broadcast_to(shifted[None, :, None], a.shape)
    f = leaks(a, forb, valid, "causal", "decoder")
    return cases, [f], [diag("mask_shifted", "decoder", f, 1)]


def case_no_causal(out, seed):
    right = causal_blocked(T)
    a_bad = run_causal(seed, 2, [None, None])
    a_good = run_causal(seed, 2, [right, right])
    forb = np.broadcast_to(right.numpy(), a_bad.shape)
    f = leaks(a_bad, forb, np.ones((B, T), bool), "causal", "decoder")
    cases = {n: {"decoder/attn": a, "meta": causal_meta()} for n, a in (("bad", a_bad), ("good", a_good))}
    return cases, [f], [diag("no_causal_mask", "decoder", f)]


def case_inverted(out, seed):
    right = causal_blocked(T)
    bug = ~right  # a True = allowed mask passed where True = blocked
    a_bad = run_causal(seed, 1, [bug])
    a_good = run_causal(seed, 1, [right])
    forb = np.broadcast_to(right.numpy(), a_bad.shape)
    f = leaks(a_bad, forb, np.ones((B, T), bool), "causal", "decoder")
    # the last query row has every key blocked: NaN
    assert np.isnan(a_bad[:, :, :, T - 1]).all()
    nan = finding("decoder", "nan_rows", {(0, h, b) for h in range(H) for b in range(B)}, rows=H * B)
    cases = {n: {"decoder/attn": a, "meta": causal_meta()} for n, a in (("bad", a_bad), ("good", a_good))}
    return cases, [f, nan], [diag("inverted_mask", "decoder", f), diag("nan_rows", "decoder", nan, 0)]


def case_some_layers(out, seed):
    right = causal_blocked(T)
    a_bad = run_causal(seed, 3, [right, None, right])  # layer 1 takes a path without the mask
    a_good = run_causal(seed, 3, [right, right, right])
    forb = np.zeros(a_bad.shape, bool)
    forb[1] = right.numpy()
    f = leaks(a_bad, forb, np.ones((B, T), bool), "causal", "decoder")
    cases = {n: {"decoder/attn": a, "meta": causal_meta()} for n, a in (("bad", a_bad), ("good", a_good))}
    return cases, [f], [diag("no_causal_mask", "decoder", f), diag("only_some_layers", "decoder", f)]


def float_mask(blocked):
    m = torch.zeros(blocked.shape)
    m[blocked] = float("-inf")
    return m


def case_some_heads(out, seed):
    right = causal_blocked(T)
    bh = right.expand(B, H, T, T).clone()
    bh[:, [1, 3]] = False  # a per-head mask built wrongly: heads 1 and 3 unmasked
    bug = float_mask(per_head(bh))
    good = float_mask(per_head(right.expand(B, H, T, T)))
    a_bad = run_causal(seed, 2, [bug, bug])
    a_good = run_causal(seed, 2, [good, good])
    forb = np.zeros(a_bad.shape, bool)
    forb[:, :, [1, 3]] = right.numpy()
    f = leaks(a_bad, forb, np.ones((B, T), bool), "causal", "decoder")
    cases = {n: {"decoder/attn": a, "meta": causal_meta()} for n, a in (("bad", a_bad), ("good", a_good))}
    return cases, [f], [diag("no_causal_mask", "decoder", f), diag("only_some_heads", "decoder", f)]


def case_some_batch(out, seed):
    right = causal_blocked(T)
    bh = right.expand(B, H, T, T).clone()
    bh[1] = False  # batch item 1 unmasked
    bug = per_head(bh)
    good = per_head(right.expand(B, H, T, T))
    a_bad = run_causal(seed, 2, [bug, bug])
    a_good = run_causal(seed, 2, [good, good])
    forb = np.zeros(a_bad.shape, bool)
    forb[:, 1] = right.numpy()
    f = leaks(a_bad, forb, np.ones((B, T), bool), "causal", "decoder")
    cases = {n: {"decoder/attn": a, "meta": causal_meta()} for n, a in (("bad", a_bad), ("good", a_good))}
    return cases, [f], [diag("no_causal_mask", "decoder", f), diag("only_some_batch", "decoder", f)]


def case_documents(out, seed):
    seg = np.array([[0] * 5 + [1] * 4 + [2] * 3, [0] * 7 + [1] * 5], dtype=np.int64)
    right = causal_blocked(T)
    cross = torch.from_numpy(seg[:, :, None] != seg[:, None, :])  # [B, q, k]
    good_bh = (right[None] | cross)[:, None].expand(B, H, T, T)
    a_bad = run_causal(seed, 2, [right, right])  # causal only: the packed documents see each other
    good = per_head(good_bh)
    a_good = run_causal(seed, 2, [good, good])
    forb = np.broadcast_to((cross & ~right[None]).numpy()[None, :, None], a_bad.shape)
    f = leaks(a_bad, forb, np.ones((B, T), bool), "segments", "decoder", positional=False)
    cases = {}
    for n, a in (("bad", a_bad), ("good", a_good)):
        # stored as float16 to exercise the dtype's row-sum tolerance
        cases[n] = {"decoder/attn": a.astype(np.float16), "segments/target": seg, "meta": causal_meta()}
    return cases, [f], [diag("crosses_documents", "decoder", f)]


def case_window(out, seed):
    W = 4
    q = torch.arange(T)[:, None]
    k = torch.arange(T)[None, :]
    right = causal_blocked(T) | (k <= q - W)  # keys q-W < k <= q: W keys
    bug = causal_blocked(T) | (k <= q - W - 1)  # W+1 keys
    a_bad = run_causal(seed, 2, [bug, bug])
    a_good = run_causal(seed, 2, [right, right])
    forb = np.broadcast_to((right & ~bug).numpy(), a_bad.shape)
    f = leaks(a_bad, forb, np.ones((B, T), bool), "window", "decoder")
    m = causal_meta({"window": W})
    cases = {n: {"decoder/attn": a, "meta": m} for n, a in (("bad", a_bad), ("good", a_good))}
    return cases, [f], [diag("window_too_wide", "decoder", f, 1)]


def case_nan_spread(out, seed):
    pad = 3  # left padding of batch item 1
    valid = np.ones((B, T), bool)
    valid[1, :pad] = False
    kpm = torch.from_numpy(~valid)
    right = causal_blocked(T)
    a_bad = run_causal(seed, 2, [right, right], kpm=kpm)  # pad rows fully masked -> NaN, spreading
    assert np.isnan(a_bad[0, 1, :, :pad]).all() and not np.isnan(a_bad[0, 1, :, pad:]).any()
    assert np.isnan(a_bad[1, 1]).all() and not np.isnan(a_bad[:, 0]).any()
    # the fix: fully masked rows may attend to themselves
    blocked = right[None] | kpm[:, None, :]
    full = blocked.all(-1)
    idx = torch.arange(T)
    fixed = blocked.clone()
    for b in range(B):
        for q in range(T):
            if full[b, q]:
                fixed[b, q, q] = False
    good = per_head(fixed[:, None].expand(B, H, T, T))
    a_good = run_causal(seed, 2, [good, good])
    assert not np.isnan(a_good).any()
    nan = finding("decoder", "nan_rows", {(1, h, 1) for h in range(H)}, rows=H * (T - pad))
    cases = {}
    for n, a in (("bad", a_bad), ("good", a_good)):
        cases[n] = {"decoder/attn": a, "valid/target": valid.astype(np.uint8), "tokens/target": np.stack([toks(T), toks(T, 3)]), "meta": causal_meta()}
    return cases, [nan], [diag("nan_rows", "decoder", nan, 1)]


def case_train_mode(out, seed):
    right = causal_blocked(T)
    p = 0.1
    a_bad = run_causal(seed, 2, [right, right], dropout=p, train=True)
    a_good = run_causal(seed, 2, [right, right], dropout=p, train=False)
    allowed = ~right.numpy()
    zeros = int((a_bad[..., allowed] == 0).sum())
    total = int(np.broadcast_to(allowed, a_bad.shape).sum())
    units = set()
    for l in range(2):
        for b in range(B):
            for h in range(H):
                if (np.abs(a_bad[l, b, h].astype(np.float64).sum(-1) - 1) > 1e-5).any():
                    units.add((l, h, b))
    f = finding("decoder", "row_sum", units)
    cases = {n: {"decoder/attn": a, "meta": causal_meta()} for n, a in (("bad", a_bad), ("good", a_good))}
    # value: the fraction of exactly-zero allowed cells heed estimates p from (dropout p = 0.1)
    return cases, [f], [diag("train_mode", "decoder", f, zeros / total, 1e-12)]


class EncDec(torch.nn.Module):
    def __init__(self, layers):
        super().__init__()
        mk = lambda: torch.nn.ModuleList(torch.nn.MultiheadAttention(E, H, batch_first=True) for _ in range(layers))
        self.enc, self.dec, self.crs = mk(), mk(), mk()
        self.ln = torch.nn.ModuleList(torch.nn.LayerNorm(E) for _ in range(3 * layers))

    def forward(self, src, tgt, src_kpm, tgt_kpm, memory_kpm, cross_mask=None):
        L = len(self.enc)
        ws = {"encoder": [], "decoder": [], "cross": []}
        kw = dict(need_weights=True, average_attn_weights=False)
        x = src
        for l in range(L):
            y, w = self.enc[l](x, x, x, key_padding_mask=src_kpm, **kw)
            x = self.ln[l](x + y)
            ws["encoder"].append(w)
        mem = x
        t = tgt
        causal = causal_blocked(tgt.shape[1])
        for l in range(L):
            y, w = self.dec[l](t, t, t, attn_mask=causal, key_padding_mask=tgt_kpm, **kw)
            t = self.ln[L + l](t + y)
            ws["decoder"].append(w)
            y, w = self.crs[l](t, mem, mem, attn_mask=cross_mask, key_padding_mask=memory_kpm, **kw)
            t = self.ln[2 * L + l](t + y)
            ws["cross"].append(w)
        return {k: torch.stack(v).detach().numpy() for k, v in ws.items()}


def encdec_inputs(seed):
    """The padded inputs of the cross-attention cases: 10 source and 8 target
    positions, item 1 with 7 real source tokens and 6 real targets, a seeded
    EncDec(2) and its inputs and key padding masks."""
    S, Tt = 10, 8
    sv = np.ones((B, S), bool)
    sv[1, -3:] = False
    tv = np.ones((B, Tt), bool)
    tv[1, -2:] = False
    torch.manual_seed(seed)
    m = EncDec(2).eval()
    g = torch.Generator().manual_seed(seed + 1)
    src, tgt = 1.5 * torch.randn(B, S, E, generator=g), 1.5 * torch.randn(B, Tt, E, generator=g)
    skpm, tkpm = torch.from_numpy(~sv), torch.from_numpy(~tv)
    return S, Tt, sv, tv, m, src, tgt, skpm, tkpm


def encdec_cases(bad, good, sv, tv):
    """The bad and good exports of a cross-attention case: every block's
    weights, both sides' valid masks and tokens, and the metadata."""
    S, Tt = sv.shape[1], tv.shape[1]
    mb = meta({
        "encoder": {"kind": "bidirectional", "query": "source", "key": "source", "axes": "layer batch head query key"},
        "decoder": {"kind": "causal", "query": "target", "key": "target", "axes": "layer batch head query key"},
        "cross": {"kind": "cross", "query": "target", "key": "source", "axes": "layer batch head query key"},
    })
    cases = {}
    for n, ws in (("bad", bad), ("good", good)):
        arr = {f"{k}/attn": v for k, v in ws.items()}
        arr.update({"valid/source": sv.astype(np.uint8), "valid/target": tv.astype(np.uint8),
                    "tokens/source": toks(S, 5), "tokens/target": toks(Tt), "meta": mb})
        cases[n] = arr
    return cases


def case_cross_padding(out, seed):
    S, Tt, sv, tv, m, src, tgt, skpm, tkpm = encdec_inputs(seed)
    with torch.no_grad():
        bad = m(src, tgt, skpm, tkpm, None)  # the encoder padding mask is not passed to cross-attention
        good = m(src, tgt, skpm, tkpm, skpm)
    a = bad["cross"]
    forb = np.broadcast_to((~sv)[None, :, None, None, :], a.shape)
    f = leaks(a, forb, tv, "padding", "cross", positional=False)
    cases = encdec_cases(bad, good, sv, tv)
    return cases, [f], [diag("cross_reads_padding", "cross", f)]


def cut_finding(a, allowed, judged, block, qoff=0):
    """Expected cut finding (an under-allowing mask): the units whose rows stop
    early, the rows (their last nonzero key is before their last allowed key;
    every allowed key after it is exactly 0), the allowed cells left without
    mass and the stop offsets k - p. allowed: [L, B, H, q, k] bool, what the
    rules allow."""
    units, offsets = set(), {}
    cells = 0
    for l in range(a.shape[0]):
        for b in range(a.shape[1]):
            for h in range(a.shape[2]):
                for q in range(a.shape[3]):
                    al = np.nonzero(allowed[l, b, h, q])[0]
                    nz = np.nonzero(a[l, b, h, q])[0]
                    if not judged[b, q] or len(al) == 0 or len(nz) == 0 or nz[-1] >= al[-1]:
                        continue
                    units.add((l, h, b))
                    cells += int((al > nz[-1]).sum())
                    o = int(nz[-1] - (q + qoff))
                    offsets[o] = offsets.get(o, 0) + 1
    f = finding(block, "cut", units, cells, offsets)
    f["rows"] = sum(offsets.values())
    return f


def case_cross_causal(out, seed):
    """Cross-attention made causal: the decoder's triangular mask is passed to
    the cross-attention call too, on a rectangular [8 target, 10 source] map
    with source padding (item 1 has 7 real source tokens, 6 real targets)."""
    S, Tt, sv, tv, m, src, tgt, skpm, tkpm = encdec_inputs(seed)
    tri = torch.triu(torch.ones(Tt, S, dtype=torch.bool), diagonal=1)  # source k > target q blocked
    with torch.no_grad():
        bad = m(src, tgt, skpm, tkpm, skpm, cross_mask=tri)
        good = m(src, tgt, skpm, tkpm, skpm)
    a = bad["cross"]
    # the rules allow every real source key to every target query
    allowed = np.broadcast_to(sv[None, :, None, None, :], a.shape)
    f = cut_finding(a, allowed, tv, "cross")
    assert f["offsets"] == [[0, f["rows"]]], f["offsets"]  # every cut row stops at k = q
    cases = encdec_cases(bad, good, sv, tv)
    # the good twin has no cut row at all
    assert not cut_finding(good["cross"], allowed, tv, "cross")["layer"]
    return cases, [f], [diag("cross_causal", "cross", f, 0)]


def case_prefix_causal(out, seed):
    """A prefix-LM with P = 4 run with a plain causal mask: the prefix block is
    a triangle (prefix positions do not see later prefix positions). No
    forbidden mass: an under-allowing mask."""
    P = 4
    q = torch.arange(T)[:, None]
    k = torch.arange(T)[None, :]
    right = (k > q) & ~((q < P) & (k < P))
    bug = causal_blocked(T)
    a_bad = run_causal(seed, 2, [bug, bug])
    a_good = run_causal(seed, 2, [right, right])
    allowed = np.broadcast_to((~right).numpy(), a_bad.shape)
    judged = np.ones((B, T), bool)
    f = cut_finding(a_bad, allowed, judged, "decoder")
    assert f["offsets"] == [[0, 2 * H * B * (P - 1)]], f["offsets"]
    assert not cut_finding(a_good, allowed, judged, "decoder")["layer"]
    m = causal_meta({"prefix": P})
    cases = {n: {"decoder/attn": a, "meta": m} for n, a in (("bad", a_bad), ("good", a_good))}
    return cases, [f], [diag("prefix_causal", "decoder", f, 0)]


def case_decode(out, seed):
    """A KV-cache step: the last Q = 3 of K = 12 positions as queries (query
    offset K - Q = 9); the bug passes no mask for the step."""
    Q, off = 3, T - 3
    torch.manual_seed(seed)
    m = MHAStack(2).eval()
    x = inputs(seed + 1)
    q_idx = torch.arange(Q)[:, None] + off
    right = torch.arange(T)[None, :] > q_idx  # [Q, K]: keys after the query's position
    def step(mask):
        ws = []
        with torch.no_grad():
            h = x
            for l in range(2):
                y, w = m.att[l](h[:, off:], h, h, attn_mask=mask, need_weights=True, average_attn_weights=False)
                ws.append(w)
                # the cache of the next layer: the full sequence through the same layer, causally
                yy, _ = m.att[l](h, h, h, attn_mask=causal_blocked(T))
                h = m.norm[l](h + yy)
        return torch.stack(ws).numpy()
    a_bad, a_good = step(None), step(right)
    forb = np.broadcast_to(right.numpy(), a_bad.shape)
    f = leaks(a_bad, forb, np.ones((B, Q), bool), "causal", "decoder", qoff=off)
    cases = {n: {"decoder/attn": a, "meta": causal_meta()} for n, a in (("bad", a_bad), ("good", a_good))}
    return cases, [f], [diag("no_causal_mask", "decoder", f)]


def case_prefix(out, seed):
    """A prefix-LM with P = 4: the prefix sees itself both ways, the suffix is
    causal; the bug lets prefix rows see the suffix too."""
    P = 4
    q = torch.arange(T)[:, None]
    k = torch.arange(T)[None, :]
    right = (k > q) & ~((q < P) & (k < P))
    bug = right & ~(q < P)  # prefix rows unmasked
    a_bad = run_causal(seed, 2, [bug, bug])
    a_good = run_causal(seed, 2, [right, right])
    forb = np.broadcast_to((right & ~bug).numpy(), a_bad.shape)
    f = leaks(a_bad, forb, np.ones((B, T), bool), "prefix", "decoder")
    m = causal_meta({"prefix": P})
    cases = {n: {"decoder/attn": a, "meta": m} for n, a in (("bad", a_bad), ("good", a_good))}
    return cases, [f], [diag("prefix_sees_suffix", "decoder", f)]


def case_explicit(out, seed):
    """A bidirectional encoder with chunked local attention given as an explicit
    mask (BLOCK/allow, True = may attend); the bug: the mask never reaches the
    kernel."""
    chunk = torch.arange(T) // 4
    allow = chunk[:, None] == chunk[None, :]
    a_bad = run_causal(seed, 2, [None, None])
    a_good = run_causal(seed, 2, [~allow, ~allow])
    forb = np.broadcast_to((~allow).numpy(), a_bad.shape)
    f = leaks(a_bad, forb, np.ones((B, T), bool), "explicit", "encoder", positional=False)
    mb = meta({"encoder": {"kind": "bidirectional", "query": "source", "key": "source", "axes": "layer batch head query key"}})
    cases = {n: {"encoder/attn": a, "encoder/allow": allow.numpy(), "meta": mb} for n, a in (("bad", a_bad), ("good", a_good))}
    return cases, [f], [diag("explicit_mask_ignored", "encoder", f)]


CASES = [
    ("shift", case_shift),
    ("no_causal", case_no_causal),
    ("inverted", case_inverted),
    ("some_layers", case_some_layers),
    ("some_heads", case_some_heads),
    ("some_batch", case_some_batch),
    ("documents", case_documents),
    ("window", case_window),
    ("nan_spread", case_nan_spread),
    ("train_mode", case_train_mode),
    ("cross_padding", case_cross_padding),
    ("decode", case_decode),
    ("prefix", case_prefix),
    ("explicit", case_explicit),
    ("shift_padded", case_shift_padded),
    ("cross_causal", case_cross_causal),
    ("prefix_causal", case_prefix_causal),
]

# ---------------------------------------------------------------- statistics references


def stats_case(out, seed):
    """A correctly masked causal export with right padding, and the statistics
    computed with scipy and numpy."""
    L = 2
    Hs = 3
    t = 10
    valid = np.ones((B, t), bool)
    valid[1, -3:] = False
    rng = np.random.default_rng(seed)
    logits = rng.normal(size=(L, B, Hs, t, t)) * 2.0
    blocked = np.triu(np.ones((t, t), bool), 1)[None, None, None] | ~valid[None, :, None, None, :]
    logits = np.where(blocked, -np.inf, logits)
    a = np.exp(logits - logits.max(-1, keepdims=True))
    a = (a / a.sum(-1, keepdims=True)).astype(np.float32)
    a64 = a.astype(np.float64)
    refs = {"heads": []}
    for l in range(L):
        for h in range(Hs):
            acc = {k: [] for k in ("entropy", "entropy_norm", "confidence", "distance", "prev", "self", "sink", "js")}
            perb = []
            for b in range(B):
                pb = {k: [] for k in acc}
                for q in range(t):
                    if not valid[b, q]:
                        continue
                    row = a64[l, b, h, q]
                    n = int((~blocked[0, b, 0, q]).sum())
                    e = float(scipy.stats.entropy(row))  # nats; scipy normalises the row first
                    pb["entropy"].append(e)
                    pb["entropy_norm"].append(e / np.log(n) if n > 1 else 0.0)
                    pb["confidence"].append(row.max())
                    pb["distance"].append(float((row * np.abs(np.arange(t) - q)).sum()))
                    if q >= 1:
                        pb["prev"].append(row[q - 1])
                        pb["sink"].append(row[0])
                    pb["self"].append(row[q])
                    for h2 in range(Hs):
                        if h2 != h:
                            # jensenshannon returns the square root of the divergence
                            pb["js"].append(scipy.spatial.distance.jensenshannon(row, a64[l, b, h2, q]) ** 2)
                perb.append({k: float(np.mean(v)) for k, v in pb.items()})
                for k in acc:
                    acc[k] += pb[k]
            ref = {k: float(np.mean(v)) for k, v in acc.items()}
            ref.update({"layer": l, "head": h, "batch": perb})
            refs["heads"].append(ref)
    # attention rollout (Abnar & Zuidema 2020, eq. 1), numpy matmul, batch item 0
    R = None
    for l in range(L):
        m = a64[l, 0].mean(0)
        m = 0.5 * m + 0.5 * np.eye(t)
        m = m / m.sum(-1, keepdims=True)
        R = m if R is None else m @ R
    refs["rollout_batch0"] = R.tolist()
    # attention flow with scipy's integer max-flow, capacities scaled by 1e6
    flows = {}
    for q in (3, 9):
        flows[str(q)] = [flow_scipy(a64[:, 0], q, i) for i in range(t)]
    refs["flow_batch0"] = flows
    arrays = {"decoder/attn": a, "valid/target": valid.astype(np.uint8), "tokens/target": toks(t),
              "meta": causal_meta()}
    return arrays, refs


def flow_scipy(a, top, inp):
    """Max-flow from node (L, top) to node (0, inp) of the layered graph whose
    edges (l+1, i) -> (l, j) carry the residual-augmented weights of layer l."""
    L, _, n, _ = a.shape
    SCALE = 1e6
    rows, cols, caps = [], [], []
    node = lambda l, i: l * n + i
    for l in range(L):
        m = a[l].mean(0)
        m = 0.5 * m + 0.5 * np.eye(n)
        m = m / m.sum(-1, keepdims=True)
        for i in range(n):
            for j in range(n):
                c = int(round(m[i, j] * SCALE))
                if c > 0:
                    rows.append(node(l + 1, i))
                    cols.append(node(l, j))
                    caps.append(c)
    g = csr_matrix((np.array(caps, dtype=np.int32), (rows, cols)), shape=((L + 1) * n, (L + 1) * n))
    if node(L, top) == node(0, inp):
        return 1.0
    return maximum_flow(g, node(L, top), node(0, inp)).flow_value / SCALE


# ---------------------------------------------------------------- importance and relevance (custom attention with head mask)


class MaskedAttn(torch.nn.Module):
    """One attention layer whose per-head probabilities are scaled by a head mask xi
    (Michel et al. 2019) before the value product, so dL/dxi_h = sum A_h * dL/dA_h."""

    def __init__(self, heads):
        super().__init__()
        self.h = heads
        self.q = torch.nn.Linear(E, E)
        self.k = torch.nn.Linear(E, E)
        self.v = torch.nn.Linear(E, E)
        self.o = torch.nn.Linear(E, E)
        self.ln = torch.nn.LayerNorm(E)

    def forward(self, x, mem, xi, blocked):
        b, tq, _ = x.shape
        tk = mem.shape[1]
        d = E // self.h
        q = self.q(x).view(b, tq, self.h, d).transpose(1, 2)
        k = self.k(mem).view(b, tk, self.h, d).transpose(1, 2)
        v = self.v(mem).view(b, tk, self.h, d).transpose(1, 2)
        s = q @ k.transpose(-1, -2) / d ** 0.5
        if blocked is not None:
            s = s.masked_fill(blocked, float("-inf"))
        a = torch.softmax(s, -1)
        am = a * xi.view(1, self.h, 1, 1)  # the probabilities as they enter the value product
        am.retain_grad()
        y = (am @ v).transpose(1, 2).reshape(b, tq, E)
        return self.ln(x + self.o(y)), am


def importance_case(out, seed, n_files=3):
    """Decoder-only model; each file holds 2 examples (batch items); the loss of
    example x is the next-token cross-entropy of its positions. Exports A, G = dL_x/dA."""
    L, Hh, t, V = 2, 4, 8, 11
    torch.manual_seed(seed)
    layers = torch.nn.ModuleList(MaskedAttn(Hh) for _ in range(L))
    emb = torch.nn.Embedding(V, E)
    head = torch.nn.Linear(E, V)
    for mod in (layers, emb, head):
        mod.eval()
    blocked = causal_blocked(t)
    g = torch.Generator().manual_seed(seed + 7)
    files, dxi = [], []
    for f in range(n_files):
        ids = torch.randint(0, V, (B, t + 1), generator=g)
        A = np.zeros((L, B, Hh, t, t), np.float32)
        G = np.zeros_like(A)
        for b in range(B):
            xi = torch.ones(L, Hh, requires_grad=True)
            x = emb(ids[b:b + 1, :t])
            ams = []
            for l in range(L):
                x, am = layers[l](x, x, xi[l], blocked)
                ams.append(am)
            loss = torch.nn.functional.cross_entropy(head(x)[0], ids[b, 1:])
            loss.backward()
            for l in range(L):
                A[l, b] = ams[l].detach()[0].numpy()
                G[l, b] = ams[l].grad[0].numpy()
            dxi.append(xi.grad.numpy().astype(np.float64))
        files.append({"decoder/attn": A, "decoder/grad": G, "tokens/target": toks(t), "meta": causal_meta()})
    dxi = np.array(dxi)  # [examples, L, H]
    imp = np.abs(dxi).mean(0)
    norm = imp / np.sqrt((imp ** 2).sum(-1, keepdims=True))
    refs = {"examples": len(dxi), "importance": imp.tolist(), "importance_norm": norm.tolist(),
            "dxi_file0": dxi[:B].tolist()}
    # gradient-weighted relevance (Chefer et al. 2021) for file 0, batch 0, from the export
    A0, G0 = files[0]["decoder/attn"][:, 0].astype(np.float64), files[0]["decoder/grad"][:, 0].astype(np.float64)
    refs["relevance_file0_batch0"] = chefer_self(A0, G0).tolist()
    return files, refs


def abar(A, G):
    """E_h[(dy/dA * A)^+]; the exported gradient is of a loss, so y = -L: negate it."""
    return np.clip(-G * A, 0, None).mean(0)


def chefer_self(A, G):
    n = A.shape[-1]
    R = np.eye(n)
    for l in range(A.shape[0]):
        R = R + abar(A[l], G[l]) @ R
    return R


def encdec_case(out, seed):
    """Encoder-decoder with explicit attention; exports A and G of every block;
    reference: Chefer et al. (2021)'s update rules for target -> source relevance."""
    L, Hh, S, t, V = 2, 2, 7, 5, 9
    torch.manual_seed(seed)
    enc = torch.nn.ModuleList(MaskedAttn(Hh) for _ in range(L))
    dec = torch.nn.ModuleList(MaskedAttn(Hh) for _ in range(L))
    crs = torch.nn.ModuleList(MaskedAttn(Hh) for _ in range(L))
    emb = torch.nn.Embedding(V, E)
    head = torch.nn.Linear(E, V)
    g = torch.Generator().manual_seed(seed + 3)
    src = torch.randint(0, V, (1, S), generator=g)
    tgt = torch.randint(0, V, (1, t + 1), generator=g)
    one = torch.ones(Hh)
    x = emb(src)
    ams = {"encoder": [], "decoder": [], "cross": []}
    for l in range(L):
        x, am = enc[l](x, x, one, None)
        ams["encoder"].append(am)
    mem = x
    y = emb(tgt[:, :t])
    blocked = causal_blocked(t)
    for l in range(L):
        y, am = dec[l](y, y, one, blocked)
        ams["decoder"].append(am)
        y, am = crs[l](y, mem, one, None)
        ams["cross"].append(am)
    target = t - 1
    # the loss of one target position, as heed's trace explains one position
    loss = torch.nn.functional.cross_entropy(head(y)[0, target:target + 1], tgt[0, target + 1:target + 2])
    loss.backward()
    arrays = {"tokens/source": toks(S, 2), "tokens/target": toks(t, 9), "meta": meta({
        "encoder": {"kind": "bidirectional", "query": "source", "key": "source", "axes": "layer batch head query key"},
        "decoder": {"kind": "causal", "query": "target", "key": "target", "axes": "layer batch head query key"},
        "cross": {"kind": "cross", "query": "target", "key": "source", "axes": "layer batch head query key"}})}
    AG = {}
    for k, v in ams.items():
        A = np.stack([m.detach().numpy() for m in v]).astype(np.float32)  # [L, 1, H, q, k]
        G = np.stack([m.grad.numpy() for m in v]).astype(np.float32)
        arrays[f"{k}/attn"], arrays[f"{k}/grad"] = A, G
        AG[k] = (A[:, 0].astype(np.float64), G[:, 0].astype(np.float64))
    # Chefer et al. 2021: R^ss from the encoder; decoder self-attention updates R^tt
    # and R^ts; cross-attention adds (Rbar^tt)^T Abar Rbar^ss to R^ts (eq. 10).
    Rss = np.eye(S)
    for l in range(L):
        Rss = Rss + abar(*[x[l] for x in AG["encoder"]]) @ Rss
    Rtt = np.eye(t)
    Rts = np.zeros((t, S))
    for l in range(L):
        Ab = abar(*[x[l] for x in AG["decoder"]])
        Rtt = Rtt + Ab @ Rtt
        Rts = Rts + Ab @ Rts
        Ac = abar(*[x[l] for x in AG["cross"]])
        Rts = Rts + normbar(Rtt).T @ Ac @ normbar(Rss)
    # rollout-style attention-only relevance through the same rules (Abar = mean over heads)
    Rss2, Rtt2, Rts2 = np.eye(S), np.eye(t), np.zeros((t, S))
    for l in range(L):
        Rss2 = Rss2 + AG["encoder"][0][l].mean(0) @ Rss2
    for l in range(L):
        Ab = AG["decoder"][0][l].mean(0)
        Rtt2 = Rtt2 + Ab @ Rtt2
        Rts2 = Rts2 + Ab @ Rts2
        Rts2 = Rts2 + normbar(Rtt2).T @ AG["cross"][0][l].mean(0) @ normbar(Rss2)
    refs = {"target": target, "relevance_source": Rts[target].tolist(), "attention_source": Rts2[target].tolist()}
    return arrays, refs


# ---------------------------------------------------------------- main


def generate(dst):
    expected = {"cases": {}, "refs": {}}
    for i, (name, fn) in enumerate(CASES):
        cases, fs, ds = fn(dst, 100 + i)
        for twin, arr in cases.items():
            save(os.path.join(dst, f"{name}_{twin}.npz"), arr)
        expected["cases"][name] = {"bad": f"{name}_bad.npz", "good": f"{name}_good.npz", "findings": fs, "diagnoses": ds}
    arr, refs = stats_case(dst, 7)
    save(os.path.join(dst, "stats.npz"), arr)
    expected["refs"]["stats"] = refs
    files, refs = importance_case(dst, 11)
    os.makedirs(os.path.join(dst, "importance"), exist_ok=True)
    for i, f in enumerate(files):
        # stored (not deflated) members for these, to exercise both NPZ kinds
        np.savez(os.path.join(dst, "importance", f"ex{i}.npz"), **f)
    expected["refs"]["importance"] = refs
    arr, refs = encdec_case(dst, 13)
    save(os.path.join(dst, "encdec_grad.npz"), arr)
    expected["refs"]["encdec"] = refs
    with open(os.path.join(dst, "expected.json"), "w") as f:
        json.dump(expected, f, indent=1, sort_keys=True)
        f.write("\n")


def close(a, b, path=""):
    if isinstance(a, dict):
        assert isinstance(b, dict) and sorted(a) == sorted(b), f"{path}: keys differ"
        for k in a:
            close(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), f"{path}: lengths differ"
        for i, (x, y) in enumerate(zip(a, b)):
            close(x, y, f"{path}[{i}]")
    elif isinstance(a, float) or isinstance(b, float):
        assert abs(a - b) <= 1e-6 * max(1.0, abs(a)), f"{path}: {a} != {b}"
    else:
        assert a == b, f"{path}: {a!r} != {b!r}"


def check():
    tmp = tempfile.mkdtemp()
    try:
        generate(tmp)
        close(json.load(open(os.path.join(HERE, "expected.json"))), json.load(open(os.path.join(tmp, "expected.json"))))
        for root, _, names in os.walk(tmp):
            for n in names:
                if not n.endswith(".npz"):
                    continue
                rel = os.path.relpath(os.path.join(root, n), tmp)
                a, b = np.load(os.path.join(HERE, rel)), np.load(os.path.join(tmp, rel))
                assert sorted(a.files) == sorted(b.files), rel
                for k in a.files:
                    x, y = a[k], b[k]
                    assert x.dtype == y.dtype and x.shape == y.shape, (rel, k)
                    if x.dtype.kind == "f":
                        assert np.allclose(x, y, atol=1e-6, equal_nan=True), (rel, k)
                    else:
                        assert (x == y).all(), (rel, k)
        print("gen_cases: committed cases match a fresh run")
    finally:
        shutil.rmtree(tmp)


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--check", action="store_true", help="regenerate in a temp dir and compare with the committed files")
    args = ap.parse_args()
    if args.check:
        check()
    else:
        generate(HERE)
        print("gen_cases: wrote", HERE)
