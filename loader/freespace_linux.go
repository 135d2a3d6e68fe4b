package loader

import "syscall"

// freeSpace returns the bytes an unprivileged process may still write in
// the file system holding dir (statfs(2): f_bavail blocks of f_bsize), and
// false when it cannot tell.
func freeSpace(dir string) (int64, bool) {
	var st syscall.Statfs_t
	if err := syscall.Statfs(dir, &st); err != nil {
		return 0, false
	}
	return int64(st.Bavail) * int64(st.Bsize), true
}
