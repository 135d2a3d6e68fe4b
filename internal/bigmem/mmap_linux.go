package bigmem

import (
	"sync"
	"syscall"
)

// mapped maps n bytes of anonymous memory (zeroed by the kernel) with huge
// pages asked for; ok is false when the system refuses, and the caller
// makes the buffer instead.
func mapped(n int) ([]byte, func(), bool) {
	b, err := syscall.Mmap(-1, 0, n, syscall.PROT_READ|syscall.PROT_WRITE, syscall.MAP_ANON|syscall.MAP_PRIVATE)
	if err != nil {
		return nil, nil, false
	}
	_ = syscall.Madvise(b, 14) // MADV_HUGEPAGE (include/uapi/asm-generic/mman-common.h); advice only
	var once sync.Once
	return b, func() { once.Do(func() { _ = syscall.Munmap(b) }) }, true
}
