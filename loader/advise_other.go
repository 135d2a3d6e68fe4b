//go:build !linux

package loader

// adviseSequential is a no-op where heed does not pass access hints.
func adviseSequential(b []byte) {}
