package loader

import "syscall"

// adviseSequential tells the kernel that a mapping will mostly be read in
// order (heed walks layers and heads in storage order), so it reads ahead
// more. Errors are ignored: the advice is only a hint.
func adviseSequential(b []byte) {
	if len(b) > 0 {
		_ = syscall.Madvise(b, syscall.MADV_SEQUENTIAL)
	}
}
