package prefetch

import (
	"testing"
	"unsafe"
)

// TestHintsNeverFault: a hint is only a hint, so addresses that would
// fault if read (nil, unmapped, past an object's end) must be accepted.
func TestHintsNeverFault(t *testing.T) {
	b := make([]byte, 100)
	Range(unsafe.Pointer(&b[0]), 4096) // far past the object
	Range(nil, 1<<20)
	for _, a := range []uintptr{0, 1, 1 << 47, ^uintptr(0) &^ 63} {
		lineAt(a)
	}
}
