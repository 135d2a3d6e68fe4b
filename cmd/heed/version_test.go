package main

import (
	"os"
	"os/exec"
	"path/filepath"
	"runtime/debug"
	"strings"
	"testing"
)

func TestVersionFrom(t *testing.T) {
	vcs := func(mainVersion, modified string) *debug.BuildInfo {
		return &debug.BuildInfo{Main: debug.Module{Path: "github.com/heed-dev/heed", Version: mainVersion}, Settings: []debug.BuildSetting{
			{Key: "vcs", Value: "git"}, {Key: "vcs.revision", Value: "a993a8e0e3338a81ea969010733c106fc1fb5264"},
			{Key: "vcs.time", Value: "2026-12-04T04:48:35Z"}, {Key: "vcs.modified", Value: modified}}}
	}
	for _, c := range []struct {
		ld   string
		bi   *debug.BuildInfo
		want string
	}{
		{"", vcs("v0.0.0-20261204044835-a993a8e0e333", "false"), "devel (commit a993a8e0e333, 2026-12-04T04:48:35Z)"},
		{"", vcs("v0.0.0-20261204044835-a993a8e0e333+dirty", "true"), "devel (commit a993a8e0e333, 2026-12-04T04:48:35Z, with uncommitted changes)"},
		{"", vcs("(devel)", "false"), "devel (commit a993a8e0e333, 2026-12-04T04:48:35Z)"},
		{"", vcs("v0.2.0", "false"), "v0.2.0 (commit a993a8e0e333, 2026-12-04T04:48:35Z)"},
		{"", &debug.BuildInfo{Main: debug.Module{Version: "v0.2.0"}}, "v0.2.0"},
		{"", &debug.BuildInfo{Main: debug.Module{Version: "(devel)"}}, "devel (no VCS information: built outside a git clone, e.g. in a git worktree, or with -buildvcs=false)"},
		{"v9", vcs("(devel)", "true"), "v9"},
	} {
		if got := versionFrom(c.ld, c.bi); got != c.want {
			t.Errorf("versionFrom(%q, %s) = %q, want %q", c.ld, c.bi.Main.Version, got, c.want)
		}
	}
}

// TestVersionStampedFromGit builds heed in a fresh clone of this repository
// and compares what heed version and heed --version print with what git says
// of the commit (git rev-parse, git log); then with a changed file.
func TestVersionStampedFromGit(t *testing.T) {
	if testing.Short() {
		t.Skip("builds heed in a clone")
	}
	git := func(dir string, args ...string) string {
		t.Helper()
		cmd := exec.Command("git", append([]string{"-C", dir}, args...)...)
		cmd.Env = append(os.Environ(), "TZ=UTC")
		b, err := cmd.Output()
		if err != nil {
			t.Fatalf("git %v: %v", args, err)
		}
		return strings.TrimSpace(string(b))
	}
	if err := exec.Command("git", "rev-parse", "--show-toplevel").Run(); err != nil {
		t.Skipf("not in a git checkout (or no git): %v", err)
	}
	top := git(".", "rev-parse", "--show-toplevel")
	clone := filepath.Join(t.TempDir(), "heed")
	git(".", "clone", "-q", "--shared", top, clone)
	// the source under test: the working tree's changes, committed in the clone
	changed := git(top, "diff", "HEAD", "--name-only") + "\n" + git(top, "ls-files", "--others", "--exclude-standard")
	for _, f := range strings.Fields(changed) {
		b, err := os.ReadFile(filepath.Join(top, f))
		if err != nil {
			os.Remove(filepath.Join(clone, f))
			continue
		}
		os.MkdirAll(filepath.Dir(filepath.Join(clone, f)), 0o755)
		if err := os.WriteFile(filepath.Join(clone, f), b, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	git(clone, "add", "-A")
	git(clone, "-c", "user.name=heed test", "-c", "user.email=test@example.invalid", "commit", "-q", "--allow-empty", "-m", "working tree")
	rev := git(clone, "rev-parse", "HEAD")
	at := git(clone, "log", "-1", "--date=format-local:%Y-%m-%dT%H:%M:%SZ", "--format=%cd")
	bin := filepath.Join(t.TempDir(), "heed")
	build := func() {
		cmd := exec.Command("go", "build", "-buildvcs=true", "-o", bin, "./cmd/heed")
		cmd.Dir = clone
		if b, err := cmd.CombinedOutput(); err != nil {
			t.Fatalf("go build in a clone: %v\n%s", err, b)
		}
	}
	run := func(args ...string) string {
		b, err := exec.Command(bin, args...).Output()
		if err != nil {
			t.Fatalf("heed %v: %v", args, err)
		}
		return string(b)
	}
	build()
	want := "heed version devel (commit " + rev[:12] + ", " + at + ")\n"
	if got := run("--version"); got != want {
		t.Errorf("heed --version = %q, want %q (git rev-parse HEAD, git log)", got, want)
	}
	if got := run("version"); !strings.HasPrefix(got, want) || !strings.Contains(got, "HDF5 support: ") {
		t.Errorf("heed version = %q, want it to start with %q", got, want)
	}
	f := filepath.Join(clone, "cmd", "heed", "main.go")
	src, _ := os.ReadFile(f)
	if err := os.WriteFile(f, append(src, "\n// changed\n"...), 0o644); err != nil {
		t.Fatal(err)
	}
	build()
	if got := run("--version"); got != strings.TrimSuffix(want, ")\n")+", with uncommitted changes)\n" {
		t.Errorf("after a change: heed --version = %q", got)
	}
}

// The completion scripts README documents exist, and --group completes to its values.
func TestCompletion(t *testing.T) {
	for _, sh := range []string{"bash", "zsh", "fish", "powershell"} {
		if out, _, code := runSplit(t, "completion", sh); code != 0 || !strings.Contains(out, "heed") || len(out) < 1000 {
			t.Errorf("completion %s: exit %d, %d bytes", sh, code, len(out))
		}
	}
	out, _, _ := runSplit(t, "__complete", "rank", "--group", "")
	if strings.Join(strings.Fields(out), " ") != "auto examples layers one :4" {
		t.Errorf("completion of --group: %q", out)
	}
}
