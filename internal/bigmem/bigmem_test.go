package bigmem

import "testing"

// Buffers of every size are zeroed, writable to their last element, and
// freeing twice is harmless.
func TestBuffers(t *testing.T) {
	for _, n := range []int{0, 1, 1000, threshold/2 - 1, threshold/2 + 3, 3 * threshold} {
		u, free := Uint16s(n)
		if len(u) != n {
			t.Fatalf("Uint16s(%d): %d values", n, len(u))
		}
		for i := range u {
			if u[i] != 0 {
				t.Fatalf("Uint16s(%d)[%d] = %d, not zeroed", n, i, u[i])
			}
			u[i] = uint16(i)
		}
		if n > 0 && u[n-1] != uint16(n-1) {
			t.Fatalf("Uint16s(%d): last value not written", n)
		}
		free()
		free()
		f, free := Float32s(n)
		if len(f) != n {
			t.Fatalf("Float32s(%d): %d values", n, len(f))
		}
		for i := range f {
			f[i] = float32(i)
		}
		free()
	}
}
