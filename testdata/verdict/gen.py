#!/usr/bin/python3
"""Exports that tell heed little, made with PyTorch, for the verdict tests.

Run with Debian's /usr/bin/python3 (numpy, torch 1.13):

    /usr/bin/python3 testdata/verdict/gen.py           # (re)write testdata/verdict/*.npz and cases.json
    /usr/bin/python3 testdata/verdict/gen.py --check   # regenerate in a temp dir and compare with what is committed

Every case is a small stack of torch.nn.MultiheadAttention layers in eval mode
called with need_weights=True, average_attn_weights=False (per-head weights
[batch, heads, query, key], as its docstring says), given the mask named in
the case. What the export does NOT say is the point: most cases have no
metadata at all. cases.json records, per case, what the script did and what
heed must conclude from the data alone: the verdict (clean, findings,
not_judged), the inferred kind, and for leaks the layers, heads and offsets
k - q of the cells this script let through (computed from the masks here,
not from heed).
"""
import argparse
import filecmp
import json
import os
import shutil
import sys
import tempfile

import numpy as np
import torch

HERE = os.path.dirname(os.path.abspath(__file__))
E, H, B, T = 16, 4, 2, 12


def blocked_causal(n, shift=0):
    """bool [n, n], True = blocked (PyTorch's attn_mask polarity): k > q + shift."""
    return torch.triu(torch.ones(n, n, dtype=torch.bool), diagonal=1 + shift)


def run_layers(masks, seed, batch=B, n=T, dtype=torch.float32):
    """Runs len(masks) MultiheadAttention layers (residual stack); returns
    per-layer weights [batch, heads, n, n] as float32 numpy arrays."""
    torch.manual_seed(seed)
    x = torch.randn(batch, n, E, dtype=dtype)
    out = []
    for m in masks:
        mha = torch.nn.MultiheadAttention(E, H, batch_first=True).to(dtype).eval()
        with torch.no_grad():
            y, w = mha(x, x, x, attn_mask=m, need_weights=True, average_attn_weights=False)
        out.append(w)
        x = x + y
    return out


def save(path, arrays, meta=None):
    if meta is not None:
        arrays = dict(arrays)
        arrays["meta"] = np.array(json.dumps(meta))
    np.savez(path, **arrays)


def leaks(masks, right):
    """Layers and offsets k - q of the cells masks allow that right blocks
    (every head and batch item of a layer gets the same mask)."""
    layers, offsets = [], {}
    for l, m in enumerate(masks):
        mm = torch.zeros_like(right) if m is None else m
        bad = (~mm) & right
        if bad.any():
            layers.append(l)
            q, k = torch.nonzero(bad, as_tuple=True)
            for o in (k - q).tolist():
                offsets[o] = offsets.get(o, 0) + 1
    return layers, sorted(offsets)


def gen(out):
    cases = {}

    def per_layer(ws):
        return {f"decoder/attn/{l}": w.float().numpy() for l, w in enumerate(ws)}

    right = blocked_causal(T)
    # 1. A causal stack with no metadata, correct: the mask is inferred, clean.
    masks = [right] * 2
    save(os.path.join(out, "nometa_clean.npz"), per_layer(run_layers(masks, 1)))
    cases["nometa_clean"] = {"verdict": "clean", "kind": "causal", "kind_from": "inferred"}

    # 2. One leaking cell (query 5 sees key 7) in every layer, no metadata.
    bad = right.clone()
    bad[5, 7] = False
    masks = [bad] * 2
    lay, offs = leaks(masks, right)
    save(os.path.join(out, "nometa_cell.npz"), per_layer(run_layers(masks, 2)))
    cases["nometa_cell"] = {"verdict": "findings", "kind": "causal", "kind_from": "inferred",
                            "rule": "causal", "layers": lay, "heads": list(range(H)), "offsets": offs}

    # 3. A causal mask off by +1 (triu(diagonal=2)) in every layer, no metadata.
    masks = [blocked_causal(T, 1)] * 2
    lay, offs = leaks(masks, right)
    save(os.path.join(out, "nometa_shift.npz"), per_layer(run_layers(masks, 3)))
    cases["nometa_shift"] = {"verdict": "findings", "kind": "causal", "kind_from": "inferred",
                             "rule": "causal", "layers": lay, "heads": list(range(H)), "offsets": offs}

    # 4. The last of four layers lost its mask, no metadata.
    masks = [right, right, right, None]
    lay, offs = leaks(masks, right)
    save(os.path.join(out, "nometa_lastlayer.npz"), per_layer(run_layers(masks, 4)))
    cases["nometa_lastlayer"] = {"verdict": "findings", "kind": "causal", "kind_from": "inferred",
                                 "rule": "causal", "layers": lay, "heads": list(range(H)), "offsets": offs}

    # 5. No mask anywhere (an encoder), no metadata: bidirectional, clean.
    save(os.path.join(out, "nometa_dense.npz"), per_layer(run_layers([None] * 2, 5)))
    cases["nometa_dense"] = {"verdict": "clean", "kind": "bidirectional", "kind_from": "inferred"}

    # 6. A sliding window of 4 (q-4 < k <= q), no metadata.
    win = right | torch.tril(torch.ones(T, T, dtype=torch.bool), diagonal=-4)
    save(os.path.join(out, "nometa_window.npz"), per_layer(run_layers([win] * 2, 6)))
    cases["nometa_window"] = {"verdict": "clean", "kind": "causal", "kind_from": "inferred", "window": 4}

    # 7. A prefix LM with a prefix of 5, no metadata.
    pre = right.clone()
    pre[:5, :5] = False
    save(os.path.join(out, "nometa_prefix.npz"), per_layer(run_layers([pre] * 2, 7)))
    cases["nometa_prefix"] = {"verdict": "clean", "kind": "causal", "kind_from": "inferred", "prefix": 5}

    # 8. One of four layers masked: the data cannot say what was meant.
    save(os.path.join(out, "nometa_undecided.npz"), per_layer(run_layers([right, None, None, None], 8)))
    cases["nometa_undecided"] = {"verdict": "not_judged", "kind": "", "kind_from": "unknown"}

    # 8b. Cross-attention (12 target queries over 7 source keys) given a
    #     causal mask by mistake, no metadata: more queries than keys is not
    #     self-attention, so the triangle is judged as a cut.
    torch.manual_seed(13)
    tq, sk = torch.randn(B, T, E), torch.randn(B, 7, E)
    cross = torch.nn.MultiheadAttention(E, H, batch_first=True).eval()
    cut_mask = torch.triu(torch.ones(T, 7, dtype=torch.bool), diagonal=1)
    with torch.no_grad():
        _, wx = cross(tq, sk, sk, attn_mask=cut_mask, need_weights=True, average_attn_weights=False)
    save(os.path.join(out, "nometa_crosscut.npz"), {"cross/attn/0": wx.numpy()})
    cases["nometa_crosscut"] = {"verdict": "findings", "kind": "cross", "kind_from": "inferred", "rule": "cut",
                                "layers": [0], "heads": list(range(H))}

    # 9. One layer's attention saved alone as a bare [batch, head, query, key]
    #    array (3 batch items): read by rank as [layer, head, query, key]
    #    unless --axes says otherwise.
    w = run_layers([right], 9, batch=3)[0]
    np.save(os.path.join(out, "layer_alone.npy"), w.float().numpy())
    cases["layer_alone"] = {"verdict": "clean", "kind": "causal", "kind_from": "inferred", "axes_from": "rank",
                            "axes": "layer head query key", "axes_other": "batch head query key", "batch_with_axes": 3}

    # 10. Decode steps from a static (pre-allocated) cache of 16 slots: the
    #     prompt fills slots 0..5, step t writes its key at slot 6+t and its
    #     query may see slots 0..6+t; unused slots hold zero keys and are
    #     masked. The metadata says causal but not where the query is.
    S, P0, steps = 16, 6, 3
    torch.manual_seed(10)
    mha = torch.nn.MultiheadAttention(E, H, batch_first=True).eval()
    cache = torch.zeros(1, S, E)
    cache[:, :P0] = torch.randn(1, P0, E)
    arrays, arrays_pos, blocks, blocks_pos = {}, {}, {}, {}
    leak_arrays, leak_blocks = {}, {}
    for t in range(steps):
        pos = P0 + t
        cache[:, pos] = torch.randn(1, E)
        q = cache[:, pos:pos + 1]
        m = torch.zeros(1, S, dtype=torch.bool)
        m[0, pos + 1:] = True  # unused slots
        with torch.no_grad():
            _, w = mha(q, cache, cache, attn_mask=m, need_weights=True, average_attn_weights=False)
            m2 = m.clone()
            m2[0, pos + 1] = False  # the bug: one unused slot let through
            _, w2 = mha(q, cache, cache, attn_mask=m2, need_weights=True, average_attn_weights=False)
        name = f"step.{t:02d}"
        arrays[f"{name}/attn"] = w.numpy()[None]  # [layer 1, batch 1, head, 1, S]
        arrays_pos[f"{name}/attn"] = w.numpy()[None]
        leak_arrays[f"{name}/attn"] = w2.numpy()[None]
        blocks[name] = {"kind": "causal", "axes": "layer batch head query key"}
        blocks_pos[name] = {"kind": "causal", "axes": "layer batch head query key", "query_start": pos}
        leak_blocks[name] = dict(blocks_pos[name])
    save(os.path.join(out, "static_cache.npz"), arrays, {"format": "heed-export/1", "blocks": blocks})
    save(os.path.join(out, "static_cache_pos.npz"), arrays_pos, {"format": "heed-export/1", "blocks": blocks_pos})
    save(os.path.join(out, "static_cache_leak.npz"), leak_arrays, {"format": "heed-export/1", "blocks": leak_blocks})
    cases["static_cache"] = {"verdict": "not_judged", "kind": "causal", "kind_from": "metadata", "positions": "unknown"}
    cases["static_cache_pos"] = {"verdict": "clean", "kind": "causal", "kind_from": "metadata", "positions": "metadata"}
    cases["static_cache_leak"] = {"verdict": "findings", "kind": "causal", "kind_from": "metadata", "positions": "metadata",
                                  "rule": "causal", "layers": [0], "heads": list(range(H)), "offsets": [1]}

    # 10b. The same cache, a batch of two sequences decoded together whose
    #      current positions differ (6 and 9: right-padded prompts), one
    #      block with the query positions as an array B/qpos [batch, query].
    torch.manual_seed(12)
    cache2 = torch.zeros(2, S, E)
    cache2[0, :7] = torch.randn(7, E)
    cache2[1, :10] = torch.randn(10, E)
    pos2 = [6, 9]
    q2 = torch.stack([cache2[0, 6:7], cache2[1, 9:10]])
    m3 = torch.zeros(2 * H, 1, S, dtype=torch.bool)  # [batch * heads, query, key]
    for b, p in enumerate(pos2):
        m3[b * H:(b + 1) * H, 0, p + 1:] = True
    with torch.no_grad():
        _, w3 = mha(q2, cache2, cache2, attn_mask=m3, need_weights=True, average_attn_weights=False)
        m4 = m3.clone()
        m4[H:, 0, 10] = False  # the bug: item 1 sees one unused slot
        _, w4 = mha(q2, cache2, cache2, attn_mask=m4, need_weights=True, average_attn_weights=False)
    qmeta = {"format": "heed-export/1", "blocks": {"step": {"kind": "causal", "axes": "batch head query key"}}}
    qpos = np.array([[6], [9]], dtype=np.int64)
    save(os.path.join(out, "static_cache_qpos.npz"), {"step/attn/0": w3.numpy(), "step/qpos": qpos}, qmeta)
    save(os.path.join(out, "static_cache_qpos_leak.npz"), {"step/attn/0": w4.numpy(), "step/qpos": qpos}, qmeta)
    cases["static_cache_qpos"] = {"verdict": "clean", "kind": "causal", "kind_from": "metadata", "positions": "qpos"}
    cases["static_cache_qpos_leak"] = {"verdict": "findings", "kind": "causal", "kind_from": "metadata", "positions": "qpos",
                                       "rule": "causal", "layers": [0], "heads": list(range(H)), "offsets": [1], "batch": [1]}

    # 11. A bfloat16 model whose attention is upcast to float32 before saving.
    ws = run_layers([right] * 2, 11, dtype=torch.bfloat16)
    dev = max(float((w.float().sum(-1) - 1).abs().max()) for w in ws)
    meta = {"format": "heed-export/1", "blocks": {"decoder": {"kind": "causal"}}}
    save(os.path.join(out, "bf16_upcast.npz"), per_layer(ws), meta)
    meta_c = {"format": "heed-export/1", "compute_dtype": "bfloat16", "blocks": {"decoder": {"kind": "causal"}}}
    save(os.path.join(out, "bf16_upcast_said.npz"), per_layer(ws), meta_c)
    cases["bf16_upcast"] = {"verdict": "clean", "kind": "causal", "kind_from": "metadata", "note": "bfloat16",
                            "max_row_dev": dev}
    cases["bf16_upcast_said"] = {"verdict": "clean", "kind": "causal", "kind_from": "metadata", "compute_dtype": "bf16"}

    # 12. Sharp cross-attention stored as float16: a target position q looks
    #     at source position q with scores -c (k - q)^2 (in_proj set to the
    #     identity on crafted inputs), so weights more than two keys away
    #     underflow to exact 0 in float16. No mask; kind cross.
    Tt = Ts = 10
    mha = torch.nn.MultiheadAttention(8, 2, batch_first=True).eval()
    with torch.no_grad():
        mha.in_proj_weight.copy_(torch.cat([torch.eye(8)] * 3))
        mha.in_proj_bias.zero_()
        s = 12.0
        qx = torch.zeros(1, Tt, 8)
        kx = torch.zeros(1, Ts, 8)
        for i in range(Tt):
            qx[0, i, 0], qx[0, i, 1] = s * i, s
            qx[0, i, 4], qx[0, i, 5] = s * i, s
        for j in range(Ts):
            kx[0, j, 0], kx[0, j, 1] = j, -j * j / 2
            kx[0, j, 4], kx[0, j, 5] = j, -j * j / 2
        _, w = mha(qx, kx, kx, need_weights=True, average_attn_weights=False)
        w16 = w.half()
        zeros_after = int(sum(((w16[0, 0, q, q + 3:] == 0).all()).item() for q in range(Tt - 3)))
        # the twin: the same layer given a causal mask by mistake, with soft scores
        kx_soft = kx / 8
        _, wc = mha(qx / 8, kx_soft, kx_soft, attn_mask=blocked_causal(Tt), need_weights=True, average_attn_weights=False)
    cross_meta = {"format": "heed-export/1", "blocks": {"cross": {"kind": "cross", "query": "target", "key": "source"}}}
    save(os.path.join(out, "f16_cross_sharp.npz"), {"cross/attn/0": w16.numpy()}, cross_meta)
    save(os.path.join(out, "f16_cross_causal.npz"), {"cross/attn/0": wc.half().numpy()}, cross_meta)
    cases["f16_cross_sharp"] = {"verdict": "clean", "kind": "cross", "kind_from": "metadata", "rows_ending_in_zeros": zeros_after}
    cases["f16_cross_causal"] = {"verdict": "findings", "kind": "cross", "kind_from": "metadata", "rule": "cut",
                                 "layers": [0], "heads": [0, 1]}

    with open(os.path.join(out, "cases.json"), "w") as f:
        json.dump(cases, f, indent=1, sort_keys=True)
        f.write("\n")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--check", action="store_true")
    args = ap.parse_args()
    if not args.check:
        gen(HERE)
        return
    tmp = tempfile.mkdtemp()
    try:
        gen(tmp)
        bad = [n for n in sorted(os.listdir(tmp)) if not filecmp.cmp(os.path.join(tmp, n), os.path.join(HERE, n), shallow=False)]
        if bad:
            print("verdict fixtures differ from a fresh run:", bad, file=sys.stderr)
            sys.exit(1)
    finally:
        shutil.rmtree(tmp)


if __name__ == "__main__":
    main()
