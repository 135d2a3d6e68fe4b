package main

import (
	"bytes"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"testing"

	"gopkg.in/yaml.v3"
)

// docBlock returns the fenced code block that follows the line
// "<!-- file: NAME ..." in docs/scale.md, as written there (the recipes the
// tests run or check).
func docBlock(t *testing.T, name string) string {
	t.Helper()
	b, err := os.ReadFile(filepath.Join("..", "..", "docs", "scale.md"))
	if err != nil {
		t.Fatal(err)
	}
	doc := string(b)
	marker := "<!-- file: " + name + " "
	i := strings.Index(doc, marker)
	if i < 0 || strings.Count(doc, marker) != 1 {
		t.Fatalf("docs/scale.md: want one %q marker", marker)
	}
	rest := doc[i:]
	lines := strings.SplitAfter(rest, "\n")
	if len(lines) < 3 || !strings.HasPrefix(lines[1], "```") {
		t.Fatalf("docs/scale.md: no code block right after %q", marker)
	}
	var body strings.Builder
	for _, l := range lines[2:] {
		if strings.HasPrefix(l, "```") {
			return body.String()
		}
		body.WriteString(l)
	}
	t.Fatalf("docs/scale.md: the block after %q does not end", marker)
	return ""
}

// kubeJob holds the fields of a batch/v1 Job that the recipes use, named as
// in the Kubernetes API reference (Job, JobSpec, PodSpec, Container,
// ResourceRequirements, VolumeMount, Volume,
// PersistentVolumeClaimVolumeSource; from the API reference as remembered,
// no schema is fetched). Decoding is strict: a field not listed here, a
// misspelt one or one at the wrong level fails the test, so a field added
// to the docs has to be added here with its place in the schema.
type kubeJob struct {
	APIVersion string `yaml:"apiVersion"`
	Kind       string `yaml:"kind"`
	Metadata   struct {
		Name string `yaml:"name"`
	} `yaml:"metadata"`
	Spec struct {
		CompletionMode       string `yaml:"completionMode"`
		Completions          *int32 `yaml:"completions"`
		Parallelism          *int32 `yaml:"parallelism"`
		BackoffLimit         *int32 `yaml:"backoffLimit"`
		BackoffLimitPerIndex *int32 `yaml:"backoffLimitPerIndex"`
		Template             struct {
			Spec struct {
				RestartPolicy string `yaml:"restartPolicy"`
				Containers    []struct {
					Name      string   `yaml:"name"`
					Image     string   `yaml:"image"`
					Command   []string `yaml:"command"`
					Args      []string `yaml:"args"`
					Resources struct {
						Requests map[string]string `yaml:"requests"`
						Limits   map[string]string `yaml:"limits"`
					} `yaml:"resources"`
					VolumeMounts []struct {
						Name      string `yaml:"name"`
						MountPath string `yaml:"mountPath"`
					} `yaml:"volumeMounts"`
				} `yaml:"containers"`
				Volumes []struct {
					Name                  string `yaml:"name"`
					PersistentVolumeClaim *struct {
						ClaimName string `yaml:"claimName"`
					} `yaml:"persistentVolumeClaim"`
				} `yaml:"volumes"`
			} `yaml:"spec"`
		} `yaml:"template"`
	} `yaml:"spec"`
}

// dnsLabel is an RFC 1123 label, what Kubernetes requires of container
// names, and of the names of Indexed Jobs (their pods' hostnames).
var dnsLabel = regexp.MustCompile(`^[a-z0-9]([-a-z0-9]*[a-z0-9])?$`)

func parseJob(t *testing.T, name string) kubeJob {
	t.Helper()
	dec := yaml.NewDecoder(strings.NewReader(docBlock(t, name)))
	dec.KnownFields(true)
	var j kubeJob
	if err := dec.Decode(&j); err != nil {
		t.Fatalf("%s: %v", name, err)
	}
	s := j.Spec.Template.Spec
	switch {
	case j.APIVersion != "batch/v1" || j.Kind != "Job":
		t.Errorf("%s: apiVersion %q kind %q, want batch/v1 Job", name, j.APIVersion, j.Kind)
	case !dnsLabel.MatchString(j.Metadata.Name) || len(j.Metadata.Name) > 63:
		t.Errorf("%s: metadata.name %q is not a DNS label", name, j.Metadata.Name)
	case s.RestartPolicy != "Never" && s.RestartPolicy != "OnFailure":
		t.Errorf("%s: restartPolicy %q; a Job's pods need Never or OnFailure", name, s.RestartPolicy)
	case len(s.Containers) != 1:
		t.Fatalf("%s: %d containers, want 1", name, len(s.Containers))
	}
	c := s.Containers[0]
	if !dnsLabel.MatchString(c.Name) || c.Image == "" {
		t.Errorf("%s: container name %q, image %q", name, c.Name, c.Image)
	}
	for _, m := range c.VolumeMounts {
		found := false
		for _, v := range s.Volumes {
			found = found || (v.Name == m.Name && v.PersistentVolumeClaim != nil && v.PersistentVolumeClaim.ClaimName != "")
		}
		if !found || !strings.HasPrefix(m.MountPath, "/") {
			t.Errorf("%s: volumeMount %q at %q has no volume with a claim", name, m.Name, m.MountPath)
		}
	}
	if len(c.Command) != 2 || c.Command[0] != "sh" || c.Command[1] != "-c" || len(c.Args) != 1 {
		t.Fatalf("%s: command %q args %q, want sh -c SCRIPT", name, c.Command, c.Args)
	}
	// The script, as sh will get it, parses (POSIX sh -n: read, not run).
	if out, err := exec.Command("/bin/sh", "-n", "-c", c.Args[0]).CombinedOutput(); err != nil {
		t.Errorf("%s: sh -n: %v %s\n%s", name, err, out, c.Args[0])
	}
	return j
}

// The Kubernetes recipe in docs/scale.md (issue 20): an Indexed Job of N
// completions whose pods run shard JOB_COMPLETION_INDEX/N, and a merge Job
// over the directory those shards write to.
func TestKubeRecipe(t *testing.T) {
	rank := parseJob(t, "heed-rank.yaml")
	sp := rank.Spec
	if sp.CompletionMode != "Indexed" || sp.Completions == nil || *sp.Completions < 1 || sp.Parallelism == nil || *sp.Parallelism < 1 {
		t.Fatalf("heed-rank.yaml: completionMode %q, completions %v, parallelism %v; want Indexed and both set",
			sp.CompletionMode, sp.Completions, sp.Parallelism)
	}
	if sp.BackoffLimitPerIndex != nil && *sp.BackoffLimitPerIndex < 0 {
		t.Errorf("backoffLimitPerIndex %d", *sp.BackoffLimitPerIndex)
	}
	c := sp.Template.Spec.Containers[0]
	script := strings.Join(strings.Fields(c.Args[0]), " ")
	m := regexp.MustCompile(`^heed rank (\S+) --shard "\$\{JOB_COMPLETION_INDEX\}/(\d+)" --partial "(\S+)/rank-\$\{JOB_COMPLETION_INDEX\}\.json"$`).FindStringSubmatch(script)
	if m == nil {
		t.Fatalf("heed-rank.yaml: the command is not heed rank SET --shard \"${JOB_COMPLETION_INDEX}/N\" --partial DIR/rank-${JOB_COMPLETION_INDEX}.json:\n%s", script)
	}
	if m[2] != fmt.Sprint(*sp.Completions) {
		t.Errorf("heed-rank.yaml: --shard .../%s but completions: %d; every index must be a shard of N = completions", m[2], *sp.Completions)
	}
	if cpu := c.Resources.Limits["cpu"]; cpu == "" || cpu != c.Resources.Requests["cpu"] {
		t.Errorf("heed-rank.yaml: cpu request %q, limit %q; the docs ask for a limit equal to the request (GOMAXPROCS follows the limit)",
			c.Resources.Requests["cpu"], cpu)
	}
	mounted := func(j kubeJob, path string) bool {
		for _, vm := range j.Spec.Template.Spec.Containers[0].VolumeMounts {
			if strings.HasPrefix(path, strings.TrimSuffix(vm.MountPath, "/")+"/") {
				return true
			}
		}
		return false
	}
	if !mounted(rank, m[1]) || !mounted(rank, m[3]) {
		t.Errorf("heed-rank.yaml: the set %s or the partials' directory %s is not on a mounted volume", m[1], m[3])
	}

	merge := parseJob(t, "heed-merge.yaml")
	if merge.Spec.CompletionMode != "" || merge.Spec.Completions != nil {
		t.Errorf("heed-merge.yaml: the merge is one pod (completionMode %q)", merge.Spec.CompletionMode)
	}
	if merge.Spec.BackoffLimit == nil || *merge.Spec.BackoffLimit != 0 {
		t.Errorf("heed-merge.yaml: backoffLimit %v, want 0 (a missing shard does not come back by retrying)", merge.Spec.BackoffLimit)
	}
	ms := merge.Spec.Template.Spec.Containers[0].Args[0]
	if !strings.Contains(ms, "cd "+m[3]+"\n") || !strings.Contains(ms, "heed merge rank-*.json --json") || !mounted(merge, m[3]) {
		t.Errorf("heed-merge.yaml: does not merge %s/rank-*.json from a mounted volume:\n%s", m[3], ms)
	}
	// The merge script's exit codes: results (0, 1, 3) keep the output,
	// 2 fails the pod. Run with a stand-in heed that exits as told, in a
	// copy of the directory layout.
	root := t.TempDir()
	dir := filepath.Join(root, m[3])
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	bin := filepath.Join(root, "bin")
	os.Mkdir(bin, 0o755)
	os.WriteFile(filepath.Join(bin, "heed"), []byte("#!/bin/sh\necho '{\"report\": true}'\nexit $HEED_FAKE_EXIT\n"), 0o755)
	local := strings.ReplaceAll(ms, "cd "+m[3]+"\n", "cd "+dir+"\n")
	for _, code := range []int{0, 1, 2, 3} {
		os.Remove(filepath.Join(dir, "rank.json"))
		cmd := exec.Command("/bin/sh", "-c", local)
		cmd.Env = append(os.Environ(), "PATH="+bin+":"+os.Getenv("PATH"), fmt.Sprintf("HEED_FAKE_EXIT=%d", code))
		err := cmd.Run()
		got := 0
		if ee, ok := err.(*exec.ExitError); ok {
			got = ee.ExitCode()
		} else if err != nil {
			t.Fatal(err)
		}
		out, rerr := os.ReadFile(filepath.Join(dir, "rank.json"))
		wantExit, wantFile := 0, true
		if code == 2 {
			wantExit, wantFile = 2, false
		}
		if got != wantExit || (rerr == nil) != wantFile || (wantFile && !bytes.Contains(out, []byte("report"))) {
			t.Errorf("heed-merge.yaml with heed exiting %d: pod exits %d, rank.json %q (%v); want exit %d, file %v", code, got, out, rerr, wantExit, wantFile)
		}
	}
	if ents, _ := os.ReadDir(dir); len(ents) > 1 {
		t.Errorf("heed-merge.yaml left files behind: %v", ents)
	}
}
