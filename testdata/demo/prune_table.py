#!/usr/bin/python3
"""Measure heed's pruning plan on the demo's clean model (docs/pruning.md).

    /usr/bin/python3 testdata/demo/prune_table.py HEED_BINARY [OUT.json]

Trains the demo's clean encoder-decoder exactly as generate.py does (same
seed, data and steps), exports attention and dL/dA over 512 training
examples (importance is estimated on training data; the table is measured on
the 1000 held-out dates), runs `heed rank --json --prune-frac F` for F = 10%
... 50% of the 24 heads, masks the planned heads (the head mask of Michel,
Levy & Neubig 2019: a head's columns of its output projection set to 0) and
measures the held-out teacher-forced loss and greedy exact match, against
five random plans of the same size and against pruning the most important
heads first. Takes about three minutes on two CPU cores.
"""
import copy
import json
import os
import random
import subprocess
import sys
import tempfile

import torch

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
import generate as g  # noqa: E402


def heads_of(model):
    """(block, layer) -> Attention module, named as the demo export names them."""
    out = {}
    for i, l in enumerate(model.enc):
        out[("encoder", i)] = l.att
    for i, l in enumerate(model.dec):
        out[("decoder", i)] = l.att
        out[("cross", i)] = l.catt
    return out


def masked(model, plan):
    """A copy of model with the planned heads masked: their columns of the
    output projection zeroed (Michel et al. 2019's head mask xi_h = 0)."""
    m = copy.deepcopy(model)
    mods = heads_of(m)
    d = g.WIDTH // g.HEADS
    with torch.no_grad():
        for block, layers in plan.items():
            for layer, heads in layers.items():
                for h in heads:
                    mods[(block, int(layer))].o.weight[:, h * d:(h + 1) * d] = 0
    return m


@torch.no_grad()
def heldout_loss(model, pairs):
    model.eval()
    total, n = 0.0, 0
    for i in range(0, len(pairs), 250):
        src, dec, lab = g.encode_batch(pairs[i:i + 250])
        logits = model(src, dec, 0)
        tok = (lab != 0).sum().item()
        total += g.masked_ce(logits, lab).item() * tok
        n += tok
    return total / n


def evaluate(model, pairs):
    return {"loss": round(heldout_loss(model, pairs), 4), "exact_match": round(g.greedy_seq2seq(model, pairs, 0), 4)}


def as_plan(units):
    plan = {}
    for block, layer, head in units:
        plan.setdefault(block, {}).setdefault(str(layer), []).append(head)
    return plan


def main():
    heed = sys.argv[1]
    out_json = sys.argv[2] if len(sys.argv) > 2 else None
    g.setup_torch()
    train_data, heldout = g.make_data()
    model = g.Seq2Seq()
    g.train(model, train_data, 0, g.seq2seq_loss, "clean")
    rng = random.Random(g.SEED + 7)
    sample = [train_data[rng.randrange(len(train_data))] for _ in range(512)]
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "importance.npz")
        arrays, _ = g.seq2seq_export(model, sample, 0, "clean")
        g.write_npz(path, arrays)
        base = evaluate(model, heldout)
        rows = []
        all_heads = [(b, l, h) for (b, l) in sorted(heads_of(model)) for h in range(g.HEADS)]
        rank = json.loads(subprocess.run([heed, "rank", "--json", path], check=True, capture_output=True, text=True).stdout)
        imp = {(x["block"], x["layer"], x["head"]): x["importance"] for x in rank["heads"]}
        top_first = sorted(all_heads, key=lambda u: -imp[u])
        # how well each score ranks heads by what masking each one alone
        # costs on the same 512 examples (scipy.stats.spearmanr)
        from scipy.stats import spearmanr
        base_s = heldout_loss(model, sample)
        cost = {u: heldout_loss(masked(model, as_plan([u])), sample) - base_s for u in all_heads}
        norm = {(x["block"], x["layer"], x["head"]): x["importance_norm"] for x in rank["heads"]}
        corr = {name: round(float(spearmanr([sc[u] for u in all_heads], [cost[u] for u in all_heads])[0]), 3)
                for name, sc in (("importance", imp), ("importance_norm", norm))}
        print("spearman against single-head masking cost:", corr, flush=True)
        for frac in (0.1, 0.2, 0.3, 0.4, 0.5):
            r = json.loads(subprocess.run([heed, "rank", "--json", "--prune-frac", str(frac), path],
                                          check=True, capture_output=True, text=True).stdout)
            plan = r["plan"]["heads"]
            n = r["plan"]["pruned"]
            row = {"fraction": frac, "heads": n, "heed": evaluate(masked(model, plan), heldout)}
            rand = []
            for s in range(5):
                rr = random.Random(1000 + s)
                rand.append(evaluate(masked(model, as_plan(rr.sample(all_heads, n))), heldout))
            row["random"] = rand
            row["most_important_first"] = evaluate(masked(model, as_plan(top_first[:n])), heldout)
            rows.append(row)
            print(json.dumps(row), flush=True)
    result = {"unpruned": base, "heads_total": len(all_heads), "metric": rank["metric"],
              "spearman_vs_single_head_cost": corr, "rows": rows}
    if out_json:
        with open(out_json, "w") as f:
            json.dump(result, f, indent=1)
            f.write("\n")
    print(json.dumps(result))


if __name__ == "__main__":
    main()
