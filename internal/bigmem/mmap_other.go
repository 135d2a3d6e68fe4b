//go:build !linux

package bigmem

// mapped is not used where huge pages cannot be asked for: buffers are made.
func mapped(n int) ([]byte, func(), bool) { return nil, nil, false }
