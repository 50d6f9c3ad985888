// Package prefetch asks the processor to bring memory into its caches
// before it is read, so that the cache misses of several independent
// lookups overlap instead of following one another.
//
// A hint never faults and never changes what a program computes: an
// address that is invalid, freed or reused is simply not brought in. The
// hints cost a function call each (assembly is not inlined); they pay
// where a miss costs a hundred nanoseconds or more, as on the records of a
// cache too large for the processor's own caches. On architectures
// without an implementation here they do nothing.
package prefetch

import "unsafe"

// Addresses are passed as uintptr, not unsafe.Pointer: nothing is
// dereferenced, so no pointer rule applies to them.

// lineBytes is the cache line size assumed when a range is hinted.
const lineBytes = 64

// Line hints the cache line holding p.
func Line(p unsafe.Pointer) { lineAt(uintptr(p)) }

// Range hints the n bytes from p, one cache line at a time. They need
// not all belong to p's object: a hint past its end is as harmless as
// any other, so a caller may pass a size it has not read.
func Range(p unsafe.Pointer, n int) {
	if p == nil {
		return
	}
	a := uintptr(p)
	for off := 0; off < n; off += lineBytes {
		lineAt(a + uintptr(off))
	}
}
