//go:build !unix

package loader

// openNonblock: no such flag where heed does not run on a Unix kernel; the
// stat before the open still refuses FIFOs and devices.
const openNonblock = 0
