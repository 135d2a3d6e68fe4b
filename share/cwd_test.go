package share

import (
	"log/slog"
	"os"
	"path/filepath"
	"testing"
	"time"

	tea "charm.land/bubbletea/v2"
	gossh "golang.org/x/crypto/ssh"
)

// TestServerWritesNothingInWorkingDirectory: building, starting and stopping
// a server writes only the host key file it was given, never a key of its
// own in the current directory. (wish.NewServer writes ./id_ed25519 when no
// host key is among its options; a user running heed share must not find
// key files in whatever directory they were in.) It also stops a server
// right after Start: that used to hang when Shutdown came before Serve had
// registered its listener.
func TestServerWritesNothingInWorkingDirectory(t *testing.T) {
	keysDir := t.TempDir()
	cwd := t.TempDir()
	t.Chdir(cwd)

	// An authorized_keys file with one public key (written by ssh-keygen -t
	// ed25519 for this test; nothing signs with it).
	ak := filepath.Join(keysDir, "authorized_keys")
	if err := os.WriteFile(ak, []byte(oneAuthorizedKey), 0o600); err != nil {
		t.Fatal(err)
	}
	app := func(Guest) tea.Model { return &standIn{} }
	quiet := slog.New(slog.DiscardHandler)

	// No host key path: refused, and nothing created in its place.
	if _, err := New(Config{Listen: "127.0.0.1:0", AuthorizedKeys: ak, App: app, Logger: quiet}); err == nil {
		t.Error("New without a host key path succeeded")
	}
	assertEmpty(t, cwd)

	hk := filepath.Join(keysDir, "state", "ssh_host_ed25519_key")
	srv, err := New(Config{Listen: "127.0.0.1:0", AuthorizedKeys: ak, HostKey: hk, App: app, Logger: quiet})
	if err != nil {
		t.Fatal(err)
	}
	if err := srv.Start(); err != nil {
		t.Fatal(err)
	}
	if err := srv.Shutdown(5 * time.Second); err != nil {
		t.Fatal(err)
	}
	assertEmpty(t, cwd)
	if _, err := os.Stat(hk); err != nil {
		t.Errorf("the host key was not written where it was asked to be: %v", err)
	}
	// The only signer the server offers is the one from that file.
	if got := srv.srv.HostSigners; len(got) != 1 || gossh.FingerprintSHA256(got[0].PublicKey()) != srv.HostKeyFingerprint() {
		t.Errorf("server offers %d host keys, want only %s", len(got), srv.HostKeyFingerprint())
	}
}

func assertEmpty(t *testing.T, dir string) {
	t.Helper()
	ents, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range ents {
		t.Errorf("file written in the working directory: %s", e.Name())
	}
}

// oneAuthorizedKey is an authorized_keys line in OpenSSH's format.
const oneAuthorizedKey = "ssh-ed25519 AAAAC3NzaC1lZDI1NTE5AAAAIE/EpkalWsVUpNWXaBksiPVlI0GD3jWhLWeLpQTHU/Pv heed-test\n"
