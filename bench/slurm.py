#!/usr/bin/python3
"""What Slurm adds to a sharded heed run (docs/scale.md, "On Slurm: what a
task costs"): the recipe's two batch scripts, as written in docs/scale.md,
run on a local cluster (scripts/slurm-local.sh, as root) over numbered sets
of small files, against one heed process over the same set.

    /usr/bin/python3 bench/slurm.py --heed ./heed [--n 200 2000] [--k 8] [--rounds 3]

For each set and round: `heed rank DIR --json` in one process (outside
Slurm), then an array of k tasks (--cpus-per-task=1; the script asks for 4)
and the merge after it (afterany), submitted from a fresh directory, with
the merged rank.json compared to the one process's output byte for byte.
Timed: the one process (wall); the job from the first sbatch to the merge's
end as squeue shows it (polled every 20 ms); per task, heed's own run inside
the task (a wrapper on PATH notes the clock before and after) and the task
from Slurm's allocation to its completion (slurmctld's log, in ms), whose
difference is what Slurm and the batch script add per task. Medians over
tasks and rounds.
"""
import argparse, os, re, shutil, statistics, subprocess, sys, tempfile, time
from datetime import datetime

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from sets import write_set  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
CTLD_LOG = os.path.join(os.environ.get("HEED_SLURM_DIR", "/var/lib/heed-slurm"), "slurmctld.log")


def doc_block(name):
    doc = open(os.path.join(ROOT, "docs", "scale.md")).read()
    i = doc.index("<!-- file: %s " % name)
    body = doc[i:].split("\n", 2)[2]
    return body[: body.index("```")]


def ctld_times(after):
    """Allocation and completion times (s) of jobs in slurmctld's log after offset."""
    alloc, done = {}, {}
    with open(CTLD_LOG) as f:
        f.seek(after)
        for line in f:
            m = re.match(r"\[(\S+)\] (sched: Allocate|_job_complete:) JobId=(\S+?)(\(\d+\))? ", line)
            if not m or (m.group(2) == "_job_complete:" and not line.rstrip().endswith("done")):
                continue
            t = datetime.fromisoformat(m.group(1)).timestamp()
            (alloc if m.group(2).startswith("sched") else done)[m.group(3)] = t
    return alloc, done


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--heed", required=True)
    ap.add_argument("--dir", default="/tmp/heed-sets-bench")
    ap.add_argument("--n", type=int, nargs="+", default=[200, 2000])
    ap.add_argument("--k", type=int, default=8)
    ap.add_argument("--rounds", type=int, default=3)
    a = ap.parse_args()
    heed = os.path.abspath(a.heed)
    work = tempfile.mkdtemp(prefix="heed-slurm-bench-")
    bindir = os.path.join(work, "bin")
    os.makedirs(bindir)
    times_log = os.path.join(work, "times.log")
    with open(os.path.join(bindir, "heed"), "w") as f:
        f.write('#!/bin/sh\ns=$(date +%%s%%N)\n"%s" "$@"\nrc=$?\necho "${SLURM_JOB_ID} ${SLURM_ARRAY_TASK_ID:-merge} $s $(date +%%s%%N)" >>"%s"\nexit $rc\n'
                % (heed, times_log))
    os.chmod(os.path.join(bindir, "heed"), 0o755)
    for n in a.n:
        data = os.path.join(a.dir, "n%d" % n)
        write_set(data, n)
        single, total, task_heed, task_slurm, merge_heed, merge_slurm = [], [], [], [], [], []
        for r in range(a.rounds):
            t = time.perf_counter()
            want = subprocess.run([heed, "rank", data, "--json"], stdout=subprocess.PIPE, check=True).stdout
            single.append(time.perf_counter() - t)
            run = os.path.join(work, "n%d-r%d" % (n, r))
            os.makedirs(os.path.join(run, "logs"))
            for name in ("heed-rank.sbatch", "heed-merge.sbatch"):
                open(os.path.join(run, name), "w").write(doc_block(name))
            env = dict(os.environ, PATH=bindir + ":" + os.environ["PATH"], HEED_SET=data, HEED_SHARDS=str(a.k))
            offset = os.path.getsize(CTLD_LOG)
            open(times_log, "w").close()
            t = time.perf_counter()
            sb = lambda *args: subprocess.run(["sbatch", "--parsable", *args], cwd=run, env=env, check=True,
                                              stdout=subprocess.PIPE).stdout.decode().strip().split(";")[0]
            rank = sb("--array=0-%d" % (a.k - 1), "--cpus-per-task=1", "heed-rank.sbatch")
            merge = sb("--dependency=afterany:" + rank, "heed-merge.sbatch")
            while subprocess.run(["squeue", "-h", "-j", rank + "," + merge], stdout=subprocess.PIPE).stdout.strip():
                time.sleep(0.02)
            total.append(time.perf_counter() - t)
            got = open(os.path.join(run, "rank.json"), "rb").read()
            if got != want:
                sys.exit("n=%d round %d: the merged rank.json differs from one run" % (n, r))
            alloc, done = ctld_times(offset)
            ran = {}
            for line in open(times_log):
                job, task, s, e = line.split()
                ran[task] = (int(e) - int(s)) / 1e9
            for i in range(a.k):
                key = "%s_%d" % (rank, i)
                task_heed.append(ran[str(i)])
                task_slurm.append(done[key] - alloc[key])
            merge_heed.append(ran["merge"])
            merge_slurm.append(done[merge] - alloc[merge])
        med = lambda xs: statistics.median(xs) * 1000
        print("n=%d k=%d rounds=%d: one process %.0f ms; array + merge, first sbatch to merge end %.0f ms"
              % (n, a.k, a.rounds, med(single), med(total)))
        print("  per task: heed %.0f ms (%.0f-%.0f), Slurm allocation to completion %.0f ms (%.0f-%.0f), added by Slurm and the script %.0f ms"
              % (med(task_heed), min(task_heed) * 1000, max(task_heed) * 1000, med(task_slurm),
                 min(task_slurm) * 1000, max(task_slurm) * 1000,
                 statistics.median([s - h for s, h in zip(task_slurm, task_heed)]) * 1000))
        print("  merge: heed %.0f ms, Slurm allocation to completion %.0f ms" % (med(merge_heed), med(merge_slurm)))
    shutil.rmtree(work)


if __name__ == "__main__":
    main()
