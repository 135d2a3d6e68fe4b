"""Writes heed's causal-invariance fixtures: pairs of exports (A, B) of one
small PyTorch model whose inputs agree before position P and differ from P
on, plus cases.json, which records what each model got wrong (if anything)
and where the differences must therefore appear. heed's tests compare their
findings with cases.json, and this script checks cases.json against the
differences PyTorch itself produces.

Every pair holds only what a fused attention path can give: layer outputs
(`BLOCK/out`, caught with forward hooks) and `logits`; leak_attn_* also holds
per-head attention from the same (leaky) mask.

Usage:
  /usr/bin/python3 testdata/invariance/gen.py           # rewrite the fixtures
  /usr/bin/python3 testdata/invariance/gen.py --check   # regenerate in a temp dir and compare
"""

import json
import os
import sys
import tempfile

import numpy as np
import torch

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
import model as M  # noqa: E402

# Our own scenario: words from a harbour master's log.
VOCAB = ["ship", "dock", "crane", "tide", "north", "cargo", "pier", "storm",
         "lamp", "rope", "gull", "deck", "buoy", "fog", "hull", "mast",
         "net", "oar", "reef", "sail", "salt", "wharf", "keel", "bell"]
N = 10          # sequence length
FROM = [6, 7]   # first replaced position, per batch item
LEAK = {"layer": 2, "head": 1, "ahead": 2}


def inputs(seed):
    g = torch.Generator().manual_seed(seed)
    ids = torch.randint(0, len(VOCAB), (len(FROM), N), generator=g)
    other = ids.clone()
    for b, p in enumerate(FROM):
        shift = torch.randint(1, len(VOCAB), (N - p,), generator=g)
        other[b, p:] = (ids[b, p:] + shift) % len(VOCAB)  # every replaced token differs
    return ids, other


def tokens(ids):
    return np.array([[VOCAB[int(t)] for t in row] for row in ids])


def meta(block, kind, side):
    return json.dumps({"format": "heed-export/1",
                       "blocks": {block: {"kind": kind, "query": side, "key": side,
                                          "axes": "layer batch head query key"}}})


def save(path, block, kind, side, ids, out, logits, attn=None):
    arrays = {f"{block}/out": out.numpy().astype(np.float32),
              "logits": logits.numpy().astype(np.float32),
              f"tokens/{side}": tokens(ids),
              "meta": np.array(meta(block, kind, side))}
    if attn is not None:
        arrays[f"{block}/attn"] = attn.numpy().astype(np.float32)
    np.savez(path, **arrays)


def changed_positions(a, b, p):
    """Positions < p where a and b ([batch, pos, feature] of one layer) differ at all."""
    return [[q for q in range(p_b) if not torch.equal(a[bi, q], b[bi, q])]
            for bi, p_b in enumerate(p)]


def generate(outdir):
    torch.manual_seed(20240607)
    torch.set_num_threads(1)
    V = len(VOCAB)
    correct = M.Stack(V, d=16, heads=4, ff=32, layers=4, max_len=N).eval()
    leaky = M.Stack(V, d=16, heads=4, ff=32, layers=4, max_len=N,
                    mask=M.leaky_mask(LEAK["layer"], LEAK["head"], LEAK["ahead"])).eval()
    leaky.load_state_dict(correct.state_dict())
    torch.manual_seed(7)
    encoder = M.Stack(V, d=16, heads=4, ff=32, layers=2, max_len=N, mask=M.no_mask).eval()
    torch.manual_seed(8)
    shallow = M.Stack(V, d=16, heads=4, ff=32, layers=3, max_len=N).eval()

    ids, other = inputs(11)
    cases = {}

    # 1. The correct causal model: nothing before P may change.
    oa, la, _ = M.run(correct, ids)
    ob, lb, _ = M.run(correct, other)
    for layer in range(oa.shape[0]):
        assert changed_positions(oa[layer], ob[layer], FROM) == [[], []], "correct model changed"
    save(os.path.join(outdir, "causal_a.npz"), "decoder", "causal", "target", ids, oa, la)
    save(os.path.join(outdir, "causal_b.npz"), "decoder", "causal", "target", other, ob, lb)
    cases["causal"] = {"a": "causal_a.npz", "b": "causal_b.npz", "block": "decoder",
                       "from": FROM, "broken": None, "clean": True}

    # 1b. The same model on the first min(FROM) tokens only: other matrix
    # shapes, so float32 rounding may differ; still clean within tolerance.
    p0 = min(FROM)
    op, lp, _ = M.run(correct, ids[:, :p0])
    save(os.path.join(outdir, "prefix_b.npz"), "decoder", "causal", "target", ids[:, :p0], op, lp)
    noise = max(((oa[:, :, :p0] - op).abs() / (op.abs() + oa[:, :, :p0].pow(2).mean().sqrt())).max().item(), 0.0)
    cases["prefix"] = {"a": "causal_a.npz", "b": "prefix_b.npz", "block": "decoder",
                       "from": [p0, p0], "broken": None, "clean": True,
                       "torch_max_rel": noise}

    # 2. One head of one layer sees LEAK["ahead"] future keys. Analytically:
    # at the leak layer, query q < P changes iff it may see some key >= P,
    # i.e. q >= P - ahead; from there on the residual stream carries the
    # change to every later layer at the same positions (a causal layer can
    # only spread it to later positions, and those are affected already).
    oa2, la2, aa2 = M.run(leaky, ids, want_weights=True)
    ob2, lb2, ab2 = M.run(leaky, other, want_weights=True)
    want = [list(range(max(0, p - LEAK["ahead"]), p)) for p in FROM]
    for layer in range(oa2.shape[0]):
        got = changed_positions(oa2[layer], ob2[layer], FROM)
        exp = want if layer >= LEAK["layer"] else [[], []]
        assert got == exp, f"leak layer {layer}: torch changed {got}, analysis says {exp}"
    assert changed_positions(la2, lb2, FROM) == want
    # Heads: at the leak layer only the leaking head's rows change (its inputs
    # before P are unchanged); later, every head's rows at changed positions.
    heads = []
    for layer in range(aa2.shape[0]):
        for h in range(aa2.shape[2]):
            rows = [[q for q in range(p) if not torch.equal(aa2[layer, b, h, q], ab2[layer, b, h, q])]
                    for b, p in enumerate(FROM)]
            if layer < LEAK["layer"] or (layer == LEAK["layer"] and h != LEAK["head"]):
                assert rows == [[], []], (layer, h, rows)
            else:
                assert rows == want, (layer, h, rows)
                heads.append({"layer": layer, "head": h, "rows": rows})
    broken = dict(LEAK, what=f"layer {LEAK['layer']} head {LEAK['head']}: query q may see keys "
                             f"k <= q + {LEAK['ahead']} (causal mask off by {LEAK['ahead']})")
    expect = {"first_layer": LEAK["layer"], "layers": list(range(LEAK["layer"], oa2.shape[0])),
              "positions": want, "earliest": [w[0] for w in want]}
    save(os.path.join(outdir, "leak_a.npz"), "decoder", "causal", "target", ids, oa2, la2)
    save(os.path.join(outdir, "leak_b.npz"), "decoder", "causal", "target", other, ob2, lb2)
    cases["leak"] = {"a": "leak_a.npz", "b": "leak_b.npz", "block": "decoder", "from": FROM,
                     "broken": broken, "clean": False, "expect": expect}
    save(os.path.join(outdir, "leak_attn_a.npz"), "decoder", "causal", "target", ids, oa2, la2, aa2)
    save(os.path.join(outdir, "leak_attn_b.npz"), "decoder", "causal", "target", other, ob2, lb2, ab2)
    cases["leak_attn"] = {"a": "leak_attn_a.npz", "b": "leak_attn_b.npz", "block": "decoder",
                          "from": FROM, "broken": broken, "clean": False,
                          "expect": dict(expect, heads=heads)}

    # 3. A bidirectional encoder: every position before P sees the change at layer 0.
    oe, le, _ = M.run(encoder, ids)
    oeb, leb, _ = M.run(encoder, other)
    every = [list(range(p)) for p in FROM]
    for layer in range(oe.shape[0]):
        assert changed_positions(oe[layer], oeb[layer], FROM) == every
    save(os.path.join(outdir, "encoder_a.npz"), "encoder", "bidirectional", "source", ids, oe, le)
    save(os.path.join(outdir, "encoder_b.npz"), "encoder", "bidirectional", "source", other, oeb, leb)
    cases["encoder"] = {"a": "encoder_a.npz", "b": "encoder_b.npz", "block": "encoder",
                        "from": FROM, "broken": {"what": "no mask at all: bidirectional attention"},
                        "clean": False,
                        "expect": {"first_layer": 0, "layers": list(range(oe.shape[0])),
                                   "positions": every, "earliest": [0, 0]}}

    # 4. Not a pair: a model with another number of layers (bad input).
    os_, ls_, _ = M.run(shallow, other)
    save(os.path.join(outdir, "mismatch_b.npz"), "decoder", "causal", "target", other, os_, ls_)
    cases["mismatch"] = {"a": "causal_a.npz", "b": "mismatch_b.npz", "block": "decoder",
                         "bad_input": "decoder/out has 4 layers in A and 3 in B"}

    manifest = {"generator": "testdata/invariance/gen.py", "torch": torch.__version__.split("+")[0],
                "cases": cases}
    with open(os.path.join(outdir, "cases.json"), "w") as f:
        json.dump(manifest, f, indent=1, sort_keys=True)
        f.write("\n")


def check():
    """Regenerates into a temp dir and compares with the committed files."""
    bad = []
    with tempfile.TemporaryDirectory() as tmp:
        generate(tmp)
        for name in sorted(os.listdir(tmp)):
            new, old = os.path.join(tmp, name), os.path.join(HERE, name)
            if not os.path.exists(old):
                bad.append(f"{name}: not committed")
                continue
            if name.endswith(".json"):
                a, b = json.load(open(new)), json.load(open(old))
                a.pop("torch", None), b.pop("torch", None)
                for c in a["cases"].values():
                    c.pop("torch_max_rel", None)
                for c in b["cases"].values():
                    c.pop("torch_max_rel", None)
                if a != b:
                    bad.append(f"{name}: differs")
                continue
            with np.load(new) as a, np.load(old) as b:
                if sorted(a.files) != sorted(b.files):
                    bad.append(f"{name}: members {sorted(a.files)} vs {sorted(b.files)}")
                    continue
                for k in a.files:
                    x, y = a[k], b[k]
                    if x.dtype.kind in "fc":
                        ok = x.shape == y.shape and np.allclose(x, y, rtol=1e-5, atol=1e-6)
                    else:
                        ok = x.shape == y.shape and np.array_equal(x, y)
                    if not ok:
                        bad.append(f"{name}: {k} differs")
    for b in bad:
        print("invariance fixtures:", b, file=sys.stderr)
    return 1 if bad else 0


if __name__ == "__main__":
    if "--check" in sys.argv[1:]:
        sys.exit(check())
    generate(HERE)
