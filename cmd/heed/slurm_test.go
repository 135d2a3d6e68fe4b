package main

import (
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"
)

// The Slurm recipe of docs/scale.md: its two batch scripts are run as
// written there (docBlock), under bash as Slurm's batch step runs them
// (TestSlurmScriptsUnderBash, always) and on a real Slurm cluster
// (TestSlurmRecipe, with HEED_SLURM=1: make slurm-test brings up a
// one-node cluster with scripts/slurm-local.sh).

// heedOnPath writes dir/heed, a shell script that runs this test binary as
// heed (TestMain, HEED_TEST_AS_HEED) and notes the GOMAXPROCS each run saw
// in dir/gomaxprocs.log, and returns dir for PATH.
func heedOnPath(t *testing.T) string {
	t.Helper()
	self, err := os.Executable()
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	script := fmt.Sprintf("#!/bin/sh\necho \"${SLURM_ARRAY_TASK_ID:-none} ${GOMAXPROCS:-unset}\" >>'%s'\nHEED_TEST_AS_HEED=1 exec '%s' \"$@\"\n",
		filepath.Join(dir, "gomaxprocs.log"), self)
	if err := os.WriteFile(filepath.Join(dir, "heed"), []byte(script), 0o755); err != nil {
		t.Fatal(err)
	}
	return dir
}

// writeRecipe writes the docs' two batch scripts into dir, with every
// "rank" turned into "check" when cmd is check (as the docs say to make a
// check job).
func writeRecipe(t *testing.T, dir, cmd string) {
	t.Helper()
	for _, name := range []string{"heed-rank.sbatch", "heed-merge.sbatch"} {
		s := docBlock(t, name)
		if cmd != "rank" {
			s = strings.ReplaceAll(s, "rank", cmd)
		}
		if err := os.WriteFile(filepath.Join(dir, strings.ReplaceAll(name, "rank", cmd)), []byte(s), 0o644); err != nil {
			t.Fatal(err)
		}
	}
}

// runScript runs a batch script with bash in dir, with env added, and
// returns its combined output and exit code.
func runScript(t *testing.T, dir, script string, env ...string) (string, int) {
	t.Helper()
	cmd := exec.Command("bash", script)
	cmd.Dir = dir
	cmd.Env = append(os.Environ(), env...)
	out, err := cmd.CombinedOutput()
	if cmd.ProcessState == nil {
		t.Fatalf("bash %s: %v", script, err)
	}
	return string(out), cmd.ProcessState.ExitCode()
}

// The batch scripts under bash, with the variables Slurm sets for an array
// task: each task writes its shard of N (N from the script, whatever task
// ids are run), the merge script writes what one run prints and counts
// check's findings (exit 1) as a result, not a failed job, and a missing
// shard fails the merge with its name and leaves the earlier output alone.
func TestSlurmScriptsUnderBash(t *testing.T) {
	if _, err := exec.LookPath("bash"); err != nil {
		t.Skip("no bash")
	}
	for _, name := range []string{"heed-rank.sbatch", "heed-merge.sbatch"} {
		if out, err := exec.Command("bash", "-n", "-c", docBlock(t, name)).CombinedOutput(); err != nil {
			t.Fatalf("bash -n %s: %v %s", name, err, out)
		}
	}
	data := shardSet(t, 7)
	bin := heedOnPath(t)
	for _, cmd := range []string{"rank", "check"} {
		run := t.TempDir()
		writeRecipe(t, run, cmd)
		want, _, wantCode := runSplit(t, cmd, data, "--json")
		if cmd == "check" && wantCode != 1 {
			t.Fatalf("heed check: exit %d, want 1 (the set has findings)", wantCode)
		}
		env := []string{"PATH=" + bin + ":" + os.Getenv("PATH"), "HEED_SET=" + data, "HEED_SHARDS=4", "SLURM_CPUS_PER_TASK=1"}
		if out, code := runScript(t, run, "heed-"+cmd+".sbatch", env...); code == 0 || !strings.Contains(out, "submit as an array") {
			t.Errorf("%s script without SLURM_ARRAY_TASK_ID: exit %d %q, want a failure that says to submit an array", cmd, code, out)
		}
		// Tasks in any order, task 2 last: a rerun of one task is the same
		// script with the same N.
		for _, i := range []int{3, 0, 1} {
			if out, code := runScript(t, run, "heed-"+cmd+".sbatch", append(env, fmt.Sprintf("SLURM_ARRAY_TASK_ID=%d", i))...); code != 0 {
				t.Fatalf("%s task %d: exit %d\n%s", cmd, i, code, out)
			}
		}
		out, code := runScript(t, run, "heed-merge.sbatch", env...)
		if code != 2 || !strings.Contains(out, "missing shard: 2/4") {
			t.Errorf("%s merge without task 2: exit %d %q, want 2 naming shard 2/4", cmd, code, out)
		}
		if _, err := os.Stat(filepath.Join(run, cmd+".json")); err == nil {
			t.Errorf("%s merge without task 2 wrote %s.json", cmd, cmd)
		}
		if out, code := runScript(t, run, "heed-"+cmd+".sbatch", append(env, "SLURM_ARRAY_TASK_ID=2")...); code != 0 {
			t.Fatalf("%s task 2: exit %d\n%s", cmd, code, out)
		}
		if pf, err := readPartial(filepath.Join(run, cmd+"-2.json")); err != nil || pf.Shard.Index != 2 || pf.Shard.Count != 4 {
			t.Fatalf("%s-2.json: %v %+v, want shard 2/4", cmd, err, pf.Shard)
		}
		out, code = runScript(t, run, "heed-merge.sbatch", env...)
		got, _ := os.ReadFile(filepath.Join(run, cmd+".json"))
		if code != 0 || string(got) != want {
			t.Errorf("%s merge: exit %d %q; output equals heed %s --json: %v", cmd, code, out, cmd, string(got) == want)
		}
		if !strings.Contains(out, fmt.Sprintf("heed merge: exit %d, wrote %s.json", wantCode, cmd)) {
			t.Errorf("%s merge log %q does not give heed merge's exit %d", cmd, out, wantCode)
		}
		// A stray partial of another job: the merge fails, the report stays.
		stray := filepath.Join(run, cmd+"-9.json")
		if _, e, code := runSplit(t, cmd, data, "--shard", "1/10", "--partial", stray); code != 0 {
			t.Fatal(e)
		}
		if out, code := runScript(t, run, "heed-merge.sbatch", env...); code != 2 || !strings.Contains(out, "different jobs") {
			t.Errorf("%s merge with a partial of another job: exit %d %q", cmd, code, out)
		}
		if again, _ := os.ReadFile(filepath.Join(run, cmd+".json")); string(again) != want {
			t.Errorf("a failed merge changed %s.json", cmd)
		}
		if ents, _ := filepath.Glob(filepath.Join(run, "*.tmp")); len(ents) > 0 {
			t.Errorf("left behind: %v", ents)
		}
	}
	// Every run of heed had GOMAXPROCS from SLURM_CPUS_PER_TASK.
	log, _ := os.ReadFile(filepath.Join(bin, "gomaxprocs.log"))
	for _, l := range strings.Split(strings.TrimSpace(string(log)), "\n") {
		if !strings.HasSuffix(l, " 1") {
			t.Errorf("heed ran with GOMAXPROCS %q, want 1 (SLURM_CPUS_PER_TASK)", l)
		}
	}
}

// slurmJob is one record of `scontrol show job -o`: a job, or a task of an
// array job (or a pending group of tasks, ArrayTaskId=2-7%2).
type slurmJob struct {
	Task, State, Exit, Reason, Throttle string
}

var scontrolField = regexp.MustCompile(`(\w+)=(\S*)`)

// slurmJobs returns the records of job id, keyed by ArrayTaskId ("" for a job
// that is not an array).
func slurmJobs(t *testing.T, id string) map[string]slurmJob {
	t.Helper()
	out, err := exec.Command("scontrol", "show", "job", "-o", id).CombinedOutput()
	if err != nil {
		t.Fatalf("scontrol show job %s: %v %s", id, err, out)
	}
	jobs := map[string]slurmJob{}
	for _, line := range strings.Split(strings.TrimSpace(string(out)), "\n") {
		f := map[string]string{}
		for _, m := range scontrolField.FindAllStringSubmatch(line, -1) {
			if _, seen := f[m[1]]; !seen {
				f[m[1]] = m[2]
			}
		}
		jobs[f["ArrayTaskId"]] = slurmJob{Task: f["ArrayTaskId"], State: f["JobState"], Exit: f["ExitCode"], Reason: f["Reason"], Throttle: f["ArrayTaskThrottle"]}
	}
	return jobs
}

var slurmDone = map[string]bool{"COMPLETED": true, "FAILED": true, "CANCELLED": true, "TIMEOUT": true, "NODE_FAIL": true,
	"OUT_OF_MEMORY": true, "BOOT_FAIL": true, "DEADLINE": true, "PREEMPTED": true}

// slurmWait waits until every job and task of ids has ended and returns
// their records; it reports the largest number of tasks of one job seen
// running at once. The time limit is only against a hang.
func slurmWait(t *testing.T, ids ...string) (map[string]map[string]slurmJob, int) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Minute)
	most := 0
	for {
		all := map[string]map[string]slurmJob{}
		done := true
		for _, id := range ids {
			jobs := slurmJobs(t, id)
			running := 0
			for _, j := range jobs {
				done = done && slurmDone[j.State]
				if j.State == "RUNNING" {
					running++
				}
				if j.Reason == "DependencyNeverSatisfied" {
					t.Fatalf("job %s: DependencyNeverSatisfied", id)
				}
			}
			most = max(most, running)
			all[id] = jobs
		}
		if done {
			return all, most
		}
		if time.Now().After(deadline) {
			q, _ := exec.Command("squeue", "-a").CombinedOutput()
			t.Fatalf("jobs %v have not ended after 5 minutes:\n%s", ids, q)
		}
		time.Sleep(200 * time.Millisecond)
	}
}

// The recipe on a real Slurm (issue 20): make slurm-test runs it on a
// one-node cluster that scripts/slurm-local.sh brings up. The docs' two
// batch scripts are submitted unchanged, as the docs say, for 8 shards of
// 40 numbered .npy files written by numpy; the only option given on the
// command line besides --array and --dependency is --cpus-per-task=1 (the
// script asks for 4, which a small node may not have; the docs say to do
// so on a laptop).
func TestSlurmRecipe(t *testing.T) {
	if os.Getenv("HEED_SLURM") != "1" {
		t.Skip("HEED_SLURM is not 1: the Slurm recipe runs in make slurm-test, which brings up a local cluster (scripts/slurm-local.sh)")
	}
	for _, c := range []string{"sbatch", "scontrol", "scancel", "sinfo", "squeue", "bash"} {
		if _, err := exec.LookPath(c); err != nil {
			t.Fatalf("HEED_SLURM=1 but %s is not on PATH: install slurm-wlm and start scripts/slurm-local.sh", c)
		}
	}
	if out, err := exec.Command("sinfo", "-h", "-o", "%T").CombinedOutput(); err != nil || !regexp.MustCompile(`(?m)^(idle|mixed)$`).Match(out) {
		t.Fatalf("HEED_SLURM=1 but no node takes jobs (sinfo: %v %q): start scripts/slurm-local.sh", err, out)
	}
	const shards, files = 8, 40
	data, _ := numberedSet(t, files)
	want, e, code := runSplit(t, "rank", data, "--json")
	if code != 0 {
		t.Fatalf("heed rank: exit %d %s", code, e)
	}
	bin := heedOnPath(t)
	mask := syscall.Umask(0)
	syscall.Umask(mask)
	env := append(os.Environ(), "PATH="+bin+":"+os.Getenv("PATH"), "HEED_SET="+data, fmt.Sprintf("HEED_SHARDS=%d", shards))
	var submitted []string
	t.Cleanup(func() {
		if t.Failed() && len(submitted) > 0 {
			exec.Command("scancel", submitted...).Run()
		}
	})
	// newRun is a run's directory with the scripts and, as the docs say,
	// logs/ made before anything is submitted.
	newRun := func(t *testing.T) string {
		run := t.TempDir()
		writeRecipe(t, run, "rank")
		if err := os.Mkdir(filepath.Join(run, "logs"), 0o755); err != nil {
			t.Fatal(err)
		}
		return run
	}
	sbatch := func(t *testing.T, run string, args ...string) string {
		t.Helper()
		cmd := exec.Command("sbatch", append([]string{"--parsable"}, args...)...)
		cmd.Dir, cmd.Env = run, env
		out, err := cmd.CombinedOutput()
		if err != nil {
			t.Fatalf("sbatch %v: %v %s", args, err, out)
		}
		id, _, _ := strings.Cut(strings.TrimSpace(string(out)), ";")
		submitted = append(submitted, id)
		return id
	}
	rankArray := func(t *testing.T, run, array string, more ...string) string {
		return sbatch(t, run, append(append([]string{"--array=" + array, "--cpus-per-task=1"}, more...), "heed-rank.sbatch")...)
	}
	mergeAfter := func(t *testing.T, run, dep string) string {
		return sbatch(t, run, "--dependency="+dep, "heed-merge.sbatch")
	}
	// expect checks the records of an array job: the given tasks in the
	// given states, every other of the 8 COMPLETED. A task cancelled while
	// pending may leave no record (there is no accounting): "gone" wants
	// CANCELLED or no record.
	expect := func(t *testing.T, what string, jobs map[string]slurmJob, tasks []string, states map[string]string) {
		t.Helper()
		for _, task := range tasks {
			want := "COMPLETED"
			if s, ok := states[task]; ok {
				want = s
			}
			j, ok := jobs[task]
			if want == "gone" && ok && j.State == "CANCELLED" {
				continue
			}
			if ok && j.State != want || !ok && want != "gone" {
				t.Errorf("%s: task %s is %+v, want %s", what, task, jobs[task], want)
			}
		}
	}
	allTasks := func() []string {
		var ts []string
		for i := 0; i < shards; i++ {
			ts = append(ts, strconv.Itoa(i))
		}
		return ts
	}()
	readLog := func(t *testing.T, run, name string) string {
		b, err := os.ReadFile(filepath.Join(run, "logs", name))
		if err != nil {
			t.Errorf("log: %v", err)
		}
		return string(b)
	}
	sameAsOneRun := func(t *testing.T, what, run string) {
		t.Helper()
		got, err := os.ReadFile(filepath.Join(run, "rank.json"))
		if err != nil || string(got) != want {
			t.Errorf("%s: rank.json (%v) differs from heed rank --json over the set", what, err)
		}
	}

	t.Run("array and merge", func(t *testing.T) {
		run := newRun(t)
		rank := rankArray(t, run, "0-7")
		merge := mergeAfter(t, run, "afterany:"+rank)
		jobs, _ := slurmWait(t, rank, merge)
		expect(t, "array", jobs[rank], allTasks, nil)
		if j := jobs[merge][""]; j.State != "COMPLETED" || j.Exit != "0:0" {
			t.Errorf("merge: %+v\n%s", j, readLog(t, run, "heed-merge-"+merge+".out"))
		}
		sameAsOneRun(t, "8 tasks", run)
		for i := 0; i < shards; i++ {
			f := filepath.Join(run, fmt.Sprintf("rank-%d.json", i))
			st, err := os.Stat(f)
			if err != nil || st.Mode().Perm() != os.FileMode(0o666&^mask) {
				t.Errorf("%s: %v, mode %v; want 0666 less the submitter's umask %03o", f, err, st.Mode().Perm(), mask)
			}
			if pf, err := readPartial(f); err != nil || pf.Shard.Index != i || pf.Shard.Count != shards || len(pf.Shard.Examples) != files/shards {
				t.Errorf("%s: %v, shard %+v", f, err, pf.Shard)
			}
			if l := readLog(t, run, fmt.Sprintf("heed-rank-%s_%d.out", rank, i)); !strings.Contains(l, fmt.Sprintf("shard %d/%d: %d of %d examples", i, shards, files/shards, files)) {
				t.Errorf("task %d log: %q", i, l)
			}
		}
	})

	t.Run("throttled array", func(t *testing.T) {
		run := newRun(t)
		rank := rankArray(t, run, "0-7%2")
		merge := mergeAfter(t, run, "afterany:"+rank)
		jobs, most := slurmWait(t, rank, merge)
		expect(t, "throttled array", jobs[rank], allTasks, nil)
		if most > 2 {
			t.Errorf("throttled array: %d tasks seen running at once, want at most 2", most)
		}
		if th := jobs[rank]["0"].Throttle; th != "2" {
			t.Errorf("ArrayTaskThrottle=%s, want 2", th)
		}
		if j := jobs[merge][""]; j.State != "COMPLETED" {
			t.Errorf("merge: %+v", j)
		}
		sameAsOneRun(t, "throttled", run)
	})

	t.Run("failed task rerun alone", func(t *testing.T) {
		run := newRun(t)
		bad := filepath.Join(data, "ex0005.npy") // example 5: only task 5 of 8 opens it
		good, err := os.ReadFile(bad)
		if err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(bad, []byte("not an array\n"), 0o644); err != nil {
			t.Fatal(err)
		}
		defer os.WriteFile(bad, good, 0o644)
		rank := rankArray(t, run, "0-7%4")
		merge := mergeAfter(t, run, "afterany:"+rank)
		jobs, _ := slurmWait(t, rank, merge)
		expect(t, "array with a bad file", jobs[rank], allTasks, map[string]string{"5": "FAILED"})
		if l := readLog(t, run, "heed-rank-"+rank+"_5.out"); jobs[rank]["5"].Exit != "2:0" || !strings.Contains(l, "ex0005.npy") {
			t.Errorf("task 5: exit %s, log %q; want exit 2 naming ex0005.npy", jobs[rank]["5"].Exit, l)
		}
		if l := readLog(t, run, "heed-merge-"+merge+".out"); jobs[merge][""].State != "FAILED" || !strings.Contains(l, "missing shard: 5/8") {
			t.Errorf("merge after a failed task: %+v, log %q; want FAILED naming shard 5/8", jobs[merge][""], l)
		}
		if _, err := os.Stat(filepath.Join(run, "rank.json")); err == nil {
			t.Error("the failed merge wrote rank.json")
		}
		// The file mended, task 5 alone, then the merge again (docs).
		if err := os.WriteFile(bad, good, 0o644); err != nil {
			t.Fatal(err)
		}
		rerun := rankArray(t, run, "5")
		merge2 := mergeAfter(t, run, "afterok:"+rerun)
		jobs, _ = slurmWait(t, rerun, merge2)
		expect(t, "rerun", jobs[rerun], []string{"5"}, nil)
		if pf, err := readPartial(filepath.Join(run, "rank-5.json")); err != nil || pf.Shard.Count != shards {
			t.Errorf("rerun of task 5: %v %+v, want shard 5/%d", err, pf.Shard, shards)
		}
		if j := jobs[merge2][""]; j.State != "COMPLETED" {
			t.Errorf("merge after the rerun: %+v\n%s", j, readLog(t, run, "heed-merge-"+merge2+".out"))
		}
		sameAsOneRun(t, "after rerunning task 5", run)
	})

	t.Run("cancelled task", func(t *testing.T) {
		run := newRun(t)
		rank := rankArray(t, run, "0-7", "--hold")
		if out, err := exec.Command("scancel", rank+"_3").CombinedOutput(); err != nil {
			t.Fatalf("scancel %s_3: %v %s", rank, err, out)
		}
		if out, err := exec.Command("scontrol", "release", rank).CombinedOutput(); err != nil {
			t.Fatalf("scontrol release %s: %v %s", rank, err, out)
		}
		merge := mergeAfter(t, run, "afterany:"+rank)
		jobs, _ := slurmWait(t, rank, merge)
		expect(t, "array with a cancelled task", jobs[rank], allTasks, map[string]string{"3": "gone"})
		if _, err := os.Stat(filepath.Join(run, "rank-3.json")); err == nil {
			t.Error("the cancelled task wrote its partial")
		}
		if l := readLog(t, run, "heed-merge-"+merge+".out"); jobs[merge][""].State != "FAILED" || !strings.Contains(l, "missing shard: 3/8 (of 8 shards, 7 given)") {
			t.Errorf("merge after a cancelled task: %+v, log %q; want FAILED naming shard 3/8", jobs[merge][""], l)
		}
		// --array=3 alone is shard 3/8, not 0/1 or 3/1.
		rerun := rankArray(t, run, "3")
		merge2 := mergeAfter(t, run, "afterok:"+rerun)
		jobs, _ = slurmWait(t, rerun, merge2)
		expect(t, "rerun", jobs[rerun], []string{"3"}, nil)
		sameAsOneRun(t, "after rerunning task 3", run)
	})
	// Every task ran heed with GOMAXPROCS from SLURM_CPUS_PER_TASK (1 here;
	// the node has more cores, which a task sees under task/none).
	log, _ := os.ReadFile(filepath.Join(bin, "gomaxprocs.log"))
	for _, l := range strings.Split(strings.TrimSpace(string(log)), "\n") {
		if !strings.HasSuffix(l, " 1") {
			t.Errorf("heed ran with GOMAXPROCS %q, want 1 (SLURM_CPUS_PER_TASK)", l)
		}
	}
}
