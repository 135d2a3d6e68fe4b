package share

import (
	"bytes"
	"crypto/ed25519"
	"crypto/rand"
	"encoding/pem"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"strings"

	gossh "golang.org/x/crypto/ssh"
)

// DefaultAuthorizedKeysPath is ~/.ssh/authorized_keys, the file OpenSSH's
// sshd reads by default.
func DefaultAuthorizedKeysPath() (string, error) {
	home, err := os.UserHomeDir()
	if err != nil {
		return "", fmt.Errorf("find the home directory for authorized_keys: %w", err)
	}
	return filepath.Join(home, ".ssh", "authorized_keys"), nil
}

// DefaultHostKeyPath is os.UserConfigDir()/heed/ssh_host_ed25519_key.
func DefaultHostKeyPath() (string, error) {
	dir, err := os.UserConfigDir()
	if err != nil {
		return "", fmt.Errorf("find the config directory for the host key: %w", err)
	}
	return filepath.Join(dir, "heed", "ssh_host_ed25519_key"), nil
}

// AuthorizedKeys is the parsed content of an authorized_keys file.
type AuthorizedKeys struct {
	Keys []gossh.PublicKey
	// Skipped describes lines that were not used, one sentence each (with the
	// line number): unparseable lines and keys with options.
	Skipped []string
}

// ParseAuthorizedKeys reads an authorized_keys file in OpenSSH's format
// (sshd(8), "AUTHORIZED_KEYS FILE FORMAT").
//
// Keys that carry options (from=, command=, restrict, cert-authority, ...)
// are skipped: heed does not enforce those options, and accepting such a key
// would give it more than the file's author allowed.
func ParseAuthorizedKeys(data []byte) AuthorizedKeys {
	var ak AuthorizedKeys
	for i, line := range bytes.Split(data, []byte("\n")) {
		line = bytes.TrimSpace(bytes.TrimSuffix(line, []byte("\r")))
		if len(line) == 0 || line[0] == '#' {
			continue
		}
		key, _, options, _, err := gossh.ParseAuthorizedKey(line)
		switch {
		case err != nil:
			ak.Skipped = append(ak.Skipped, fmt.Sprintf("line %d: not a public key", i+1))
		case len(options) > 0:
			ak.Skipped = append(ak.Skipped, fmt.Sprintf("line %d: key %s has options (%s), which heed does not enforce",
				i+1, gossh.FingerprintSHA256(key), strings.Join(options, ",")))
		default:
			ak.Keys = append(ak.Keys, key)
		}
	}
	return ak
}

// LoadAuthorizedKeys reads and parses path. It fails when the file cannot be
// read, is writable by group or others (as sshd's StrictModes would refuse),
// or holds no usable key: the server never starts without a key source.
func LoadAuthorizedKeys(path string) (AuthorizedKeys, error) {
	if path == "" {
		return AuthorizedKeys{}, errors.New("no authorized_keys file given: refusing to serve without a key source")
	}
	st, err := os.Stat(path)
	if err != nil {
		return AuthorizedKeys{}, fmt.Errorf("authorized keys: %w (create it, or pass --authorized-keys PATH)", err)
	}
	if !st.Mode().IsRegular() {
		return AuthorizedKeys{}, fmt.Errorf("authorized keys: %s is not a regular file", path)
	}
	if st.Mode().Perm()&0o022 != 0 {
		return AuthorizedKeys{}, fmt.Errorf("authorized keys: %s is writable by group or others (mode %04o): chmod go-w %s", path, st.Mode().Perm(), path)
	}
	data, err := os.ReadFile(path)
	if err != nil {
		return AuthorizedKeys{}, fmt.Errorf("authorized keys: %w", err)
	}
	ak := ParseAuthorizedKeys(data)
	if len(ak.Keys) == 0 {
		return ak, fmt.Errorf("authorized keys: %s holds no usable public key: refusing to serve without a key source", path)
	}
	return ak, nil
}

// Contains reports whether key is one of ak's keys.
func (ak AuthorizedKeys) Contains(key gossh.PublicKey) bool {
	m := key.Marshal()
	for _, k := range ak.Keys {
		if bytes.Equal(k.Marshal(), m) {
			return true
		}
	}
	return false
}

// LoadOrCreateHostKey returns the SSH host key stored at path, creating an
// ed25519 key there (mode 0600, parent directory 0700) when the file does not
// exist. An existing key readable by group or others is refused, as OpenSSH
// refuses an unprotected private key file.
func LoadOrCreateHostKey(path string) (gossh.Signer, bool, error) {
	if path == "" {
		return nil, false, errors.New("host key: no path given")
	}
	data, err := os.ReadFile(path)
	if err == nil {
		st, err := os.Stat(path)
		if err != nil {
			return nil, false, fmt.Errorf("host key: %w", err)
		}
		if st.Mode().Perm()&0o077 != 0 {
			return nil, false, fmt.Errorf("host key: %s is accessible by group or others (mode %04o): chmod 600 %s", path, st.Mode().Perm(), path)
		}
		signer, err := gossh.ParsePrivateKey(data)
		if err != nil {
			return nil, false, fmt.Errorf("host key: %s: %w", path, err)
		}
		return signer, false, nil
	}
	if !errors.Is(err, fs.ErrNotExist) {
		return nil, false, fmt.Errorf("host key: %w", err)
	}
	if err := os.MkdirAll(filepath.Dir(path), 0o700); err != nil {
		return nil, false, fmt.Errorf("host key: %w", err)
	}
	_, priv, err := ed25519.GenerateKey(rand.Reader)
	if err != nil {
		return nil, false, fmt.Errorf("host key: generate: %w", err)
	}
	block, err := gossh.MarshalPrivateKey(priv, "heed share host key")
	if err != nil {
		return nil, false, fmt.Errorf("host key: encode: %w", err)
	}
	pemBytes := pem.EncodeToMemory(block)
	// O_EXCL: never overwrite a key another process created meanwhile.
	f, err := os.OpenFile(path, os.O_WRONLY|os.O_CREATE|os.O_EXCL, 0o600)
	if err != nil {
		return nil, false, fmt.Errorf("host key: %w", err)
	}
	if _, err := f.Write(pemBytes); err != nil {
		f.Close()
		os.Remove(path)
		return nil, false, fmt.Errorf("host key: write %s: %w", path, err)
	}
	if err := f.Close(); err != nil {
		os.Remove(path)
		return nil, false, fmt.Errorf("host key: write %s: %w", path, err)
	}
	signer, err := gossh.NewSignerFromKey(priv)
	if err != nil {
		return nil, false, fmt.Errorf("host key: %w", err)
	}
	return signer, true, nil
}
