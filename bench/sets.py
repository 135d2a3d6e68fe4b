#!/usr/bin/python3
"""Time and count the file opens of heed over a data set of many small
numbered per-example files (docs/scale.md, "Many small files"): one process
against k shards plus heed merge, against numpy loading the same files.

    /usr/bin/python3 bench/sets.py --heed ./heed [--old OLD_HEED] [--n 200 2000] [--k 4] [--rounds 5]

Files are written with numpy into --dir (default /tmp/heed-sets-bench; never
committed): ex0000.npy ... each [2 layers, 4 heads, 16, 16] float32, causal
softmax rows of seeded normal scores. Opens are the openat calls on .npy
files that strace counts (one run each; skipped without strace). Times are
medians of --rounds whole-process runs with the page cache warm, the
commands taken in turn within each round.
"""
import argparse, json, os, shutil, statistics, subprocess, sys, tempfile, time

import numpy as np

LOAD = r"""
import glob, sys, numpy as np
files = sorted(glob.glob(sys.argv[1] + "/*.npy"))
arrays = [np.load(f) for f in files]
if sys.argv[2] == "entropy":
    ent = np.zeros((2, 4))
    for a in arrays:
        q = a.astype(np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            ent += np.where(q > 0, -q * np.log(q), 0.0).sum(-1).sum(-1)
    print((ent / (16 * len(arrays))).tolist())
"""


def write_set(d, n):
    if os.path.isdir(d) and len(os.listdir(d)) == n:
        return
    shutil.rmtree(d, ignore_errors=True)
    os.makedirs(d)
    rng = np.random.default_rng(20)
    for i in range(n):
        x = rng.standard_normal((2, 4, 16, 16)) * 2
        x[..., np.triu(np.ones((16, 16), bool), 1)] = -np.inf
        p = np.exp(x - x.max(-1, keepdims=True))
        np.save(os.path.join(d, "ex%04d.npy" % i), (p / p.sum(-1, keepdims=True)).astype(np.float32))


def run(cmd):
    t = time.perf_counter()
    r = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    dt = time.perf_counter() - t
    if r.returncode != 0:
        sys.exit("%s: exit %d\n%s" % (" ".join(cmd), r.returncode, r.stderr.decode()))
    return dt, r.stdout


def opens(cmd):
    if not shutil.which("strace"):
        return None
    with tempfile.NamedTemporaryFile("r", suffix=".strace") as log:
        subprocess.run(["strace", "-f", "-e", "trace=openat", "-o", log.name] + cmd,
                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True)
        return sum(1 for line in open(log.name) if '.npy"' in line and "ENOENT" not in line)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--heed", required=True)
    ap.add_argument("--old", help="a heed built before the numbered-files rule, for comparison")
    ap.add_argument("--dir", default="/tmp/heed-sets-bench")
    ap.add_argument("--n", type=int, nargs="+", default=[200, 2000])
    ap.add_argument("--k", type=int, default=4)
    ap.add_argument("--rounds", type=int, default=5)
    a = ap.parse_args()
    py = sys.executable
    out = tempfile.mkdtemp()
    for n in a.n:
        d = os.path.join(a.dir, "n%d" % n)
        write_set(d, n)
        parts = [os.path.join(out, "p%d.json" % i) for i in range(a.k)]
        cmds = {
            "heed rank (one process)": [a.heed, "rank", d, "--json"],
            "numpy: load every file": [py, "-c", LOAD, d, "load"],
            "numpy: load + row entropy per head": [py, "-c", LOAD, d, "entropy"],
            "heed merge": [a.heed, "merge", "--json"] + parts,
        }
        for i in range(a.k):
            cmds["heed rank shard %d/%d" % (i, a.k)] = [a.heed, "rank", d, "--shard", "%d/%d" % (i, a.k), "--partial", parts[i]]
        if a.old:
            cmds["before: heed rank (one process)"] = [a.old, "rank", d, "--json"]
            cmds["before: heed rank shard 1/%d" % a.k] = [a.old, "rank", d, "--shard", "1/%d" % a.k, "--partial", os.path.join(out, "old.json")]
        order = [c for c in cmds if c != "heed merge"] + ["heed merge"]  # merge after its shards
        times = {c: [] for c in cmds}
        outs = {}
        for _ in range(a.rounds):
            for c in order:
                dt, o = run(cmds[c])
                times[c].append(dt)
                outs[c] = o
        if outs["heed merge"] != outs["heed rank (one process)"]:
            sys.exit("n=%d: the merged report differs from the single run" % n)
        heads = json.loads(outs["heed rank (one process)"])["heads"]
        ref = json.loads(outs["numpy: load + row entropy per head"])
        diff = max(abs(h["entropy"] - ref[h["layer"]][h["head"]]) / ref[h["layer"]][h["head"]] for h in heads)
        shard = [c for c in cmds if c.startswith("heed rank shard")]
        print("\n%d files of [2, 4, 16, 16] float32 (%.1f MB); merge == one run byte for byte; entropy vs numpy: max rel diff %.1e"
              % (n, sum(os.path.getsize(os.path.join(d, f)) for f in os.listdir(d)) / 1e6, diff))
        print("| run | median wall | .npy files opened (openat) |\n|---|---|---|")
        for c in order:
            print("| %s | %.1f ms | %s |" % (c, 1e3 * statistics.median(times[c]), opens(cmds[c])))
        print("| %d shards: the slowest / all + merge | %.1f ms / %.1f ms | |" % (
            a.k, 1e3 * max(statistics.median(times[c]) for c in shard),
            1e3 * (sum(statistics.median(times[c]) for c in shard) + statistics.median(times["heed merge"]))))
    shutil.rmtree(out)


if __name__ == "__main__":
    main()
