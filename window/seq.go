package window

import (
	"unsafe"

	"github.com/tallyward/tallyward/internal/prefetch"
)

// seq is a slice used as a queue: elements leave at the front (advance lo),
// arrive mostly at the back, and now and then in the middle. Storage is
// reused: when the back is full the live part is moved down before growing,
// so a steady state of push/popFront allocates nothing.
//
// Invariant: 0 <= lo <= len(buf); the live elements are buf[lo:].
type seq[T any] struct {
	buf []T
	lo  int
}

func (s *seq[T]) len() int       { return len(s.buf) - s.lo }
func (s *seq[T]) live() []T      { return s.buf[s.lo:] }
func (s *seq[T]) at(i int) *T    { return &s.buf[s.lo+i] }
func (s *seq[T]) last() *T       { return &s.buf[len(s.buf)-1] }
func (s *seq[T]) popFront(k int) { s.lo += k; s.compactIfEmpty() }

func (s *seq[T]) compactIfEmpty() {
	if s.lo == len(s.buf) {
		s.buf, s.lo = s.buf[:0], 0
	}
}

// clear empties s and keeps its storage.
func (s *seq[T]) clear() { s.buf, s.lo = s.buf[:0], 0 }

// room makes space for one more element at the back.
func (s *seq[T]) room() {
	if len(s.buf) == cap(s.buf) && s.lo > 0 {
		n := copy(s.buf, s.buf[s.lo:])
		s.buf, s.lo = s.buf[:n], 0
	}
}

func (s *seq[T]) push(x T) {
	s.room()
	s.buf = append(s.buf, x)
}

// insert puts x at live position i (0 <= i <= len).
func (s *seq[T]) insert(i int, x T) {
	s.room()
	var zero T
	s.buf = append(s.buf, zero)
	j := s.lo + i
	copy(s.buf[j+1:], s.buf[j:])
	s.buf[j] = x
}

// setLen resizes s to n live elements starting at lo = 0, reusing storage.
func (s *seq[T]) setLen(n int) {
	s.lo = 0
	if cap(s.buf) < n {
		s.buf = make([]T, n)
		return
	}
	s.buf = s.buf[:n]
}

// sizeBytes is the storage s holds outside inl, the inline array its
// owner started it on (nil: none): that array is part of the owner's
// own size.
func (s *seq[T]) sizeBytes(elem int, inl []T) int {
	if cap(s.buf) == 0 || len(inl) > 0 && unsafe.SliceData(s.buf) == unsafe.SliceData(inl) {
		return 0
	}
	return cap(s.buf) * elem
}

// hint starts bringing s's first and last live elements into the
// processor's caches when they lie outside inl, the storage inside the
// value (brought in with the value itself).
func (s *seq[T]) hint(inl []T) {
	if s.len() == 0 || unsafe.SliceData(s.buf) == unsafe.SliceData(inl) {
		return
	}
	first, last := unsafe.Pointer(&s.buf[s.lo]), unsafe.Pointer(&s.buf[len(s.buf)-1])
	prefetch.Line(first)
	if uintptr(last)/64 != uintptr(first)/64 {
		prefetch.Line(last)
	}
}
