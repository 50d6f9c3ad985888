package tallyward

// holdSlab hands out held events and the copies of their inputs from
// chunks, so holding an event in Settled mode costs no allocation of its
// own: a chunk is allocated once per holdChunk events. A chunk stays
// alive while any event carved from it is held; events leave the hold in
// time order, close to arrival order, so chunks are released soon after
// their last event is emitted.
type holdSlab[E any] struct {
	held  []held[E]
	keys  []string
	on    []bool
	v     []float64
	items []uint64
}

const holdChunk = 1024

// carve returns n elements from *chunk, refilling it with room for
// holdChunk calls of size n when it runs out.
func carve[T any](chunk *[]T, n int) []T {
	if cap(*chunk)-len(*chunk) < n {
		*chunk = make([]T, 0, holdChunk*max(n, 1))
	}
	l := len(*chunk)
	*chunk = (*chunk)[:l+n]
	return (*chunk)[l : l+n : l+n]
}

// hold returns a held event for e with a copy of in.
func (s *holdSlab[E]) hold(seq, tie uint64, e E, in *inputs) *held[E] {
	h := &carve(&s.held, 1)[0]
	h.seq, h.tie, h.e = seq, tie, e
	h.in = inputs{t: in.t,
		keys: carve(&s.keys, len(in.keys)), on: carve(&s.on, len(in.on)),
		v: carve(&s.v, len(in.v)), item: carve(&s.items, len(in.item))}
	copy(h.in.keys, in.keys)
	copy(h.in.on, in.on)
	copy(h.in.v, in.v)
	copy(h.in.item, in.item)
	return h
}
