//go:build unix

package loader

import "syscall"

// openNonblock is added to the flags of every open of an input file: opening
// a FIFO for reading then returns at once instead of waiting for a writer
// (open(2), O_NONBLOCK), and openRegular refuses it. On a regular file the
// flag changes nothing.
const openNonblock = syscall.O_NONBLOCK
