//go:build !linux

package loader

// freeSpace cannot tell where heed does not ask the kernel; inflating into a
// temporary file then fails when the disk is full.
func freeSpace(dir string) (int64, bool) { return 0, false }
