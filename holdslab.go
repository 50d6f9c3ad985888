package tallyward

// holdSlab hands out held events and the copies of their inputs from
// chunks, so holding an event in Settled mode costs no allocation of its
// own. Events leave the hold in time order, close to arrival order, so a
// chunk empties soon after it fills; an empty chunk is cleared and
// carved again rather than left to the collector (a fresh chunk every
// 1024 events was about 300 bytes allocated per held event, and most of
// a six-feature Settled run's collections).
type holdSlab[E any] struct {
	cur   *holdChunk[E]   // being carved; nil before the first hold
	spare []*holdChunk[E] // emptied chunks, at most maxSpareChunks
}

// holdChunk is room for chunkEvents events and their inputs.
type holdChunk[E any] struct {
	held  []held[E]
	keys  []string
	on    []bool
	v     []float64
	items []uint64
	live  int // events carved from it and not yet released
}

const (
	chunkEvents = 1024
	// maxSpareChunks bounds the emptied chunks kept: a burst of held
	// events gives its memory back once it is emitted.
	maxSpareChunks = 2
)

// carve returns the next n elements of *chunk, whose capacity the caller
// sized for it.
func carve[T any](chunk *[]T, n int) []T {
	l := len(*chunk)
	*chunk = (*chunk)[:l+n]
	return (*chunk)[l : l+n : l+n]
}

// hold returns a held event for e with a copy of in. Every event held is
// released once (release) when it leaves the hold.
func (s *holdSlab[E]) hold(seq, tie uint64, e E, in *inputs) *held[E] {
	c := s.cur
	if c == nil || len(c.held) == cap(c.held) {
		c = s.next(in)
	}
	c.live++
	h := &carve(&c.held, 1)[0]
	h.seq, h.tie, h.e, h.from = seq, tie, e, c
	h.in = inputs{t: in.t,
		keys: carve(&c.keys, len(in.keys)), on: carve(&c.on, len(in.on)),
		v: carve(&c.v, len(in.v)), item: carve(&c.items, len(in.item))}
	copy(h.in.keys, in.keys)
	copy(h.in.on, in.on)
	copy(h.in.v, in.v)
	copy(h.in.item, in.item)
	return h
}

// next retires the current chunk and makes a spare or a new one current.
func (s *holdSlab[E]) next(in *inputs) *holdChunk[E] {
	if old := s.cur; old != nil && old.live == 0 {
		s.keep(old)
	}
	if n := len(s.spare); n > 0 {
		s.cur = s.spare[n-1]
		s.spare[n-1] = nil
		s.spare = s.spare[:n-1]
		return s.cur
	}
	s.cur = &holdChunk[E]{
		held:  make([]held[E], 0, chunkEvents),
		keys:  make([]string, 0, chunkEvents*len(in.keys)),
		on:    make([]bool, 0, chunkEvents*len(in.on)),
		v:     make([]float64, 0, chunkEvents*len(in.v)),
		items: make([]uint64, 0, chunkEvents*len(in.item)),
	}
	return s.cur
}

// release returns h's room to its chunk: h must not be used afterwards.
// A retired chunk whose last event left is kept for reuse.
func (s *holdSlab[E]) release(h *held[E]) {
	c := h.from
	if c.live--; c.live == 0 && c != s.cur {
		s.keep(c)
	}
}

// keep clears the empty chunk c (its events and keys must not keep
// memory alive) and keeps it as a spare if there is room.
func (s *holdSlab[E]) keep(c *holdChunk[E]) {
	if len(s.spare) >= maxSpareChunks {
		return
	}
	clear(c.held)
	clear(c.keys)
	c.held, c.keys, c.on, c.v, c.items = c.held[:0], c.keys[:0], c.on[:0], c.v[:0], c.items[:0]
	s.spare = append(s.spare, c)
}
