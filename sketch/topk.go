package sketch

import (
	"cmp"
	"encoding/binary"
	"fmt"
	"github.com/tallyward/tallyward/internal/check"
	"github.com/tallyward/tallyward/internal/wire"
	"slices"

	"github.com/tallyward/tallyward/internal/sat"
)

// TopKParams sizes a Space-Saving heavy-hitter summary (Metwally, Agrawal,
// El Abbadi, "Efficient computation of frequent and top-k elements in data
// streams", ICDT 2005).
type TopKParams struct {
	// Capacity is the number of counters m. Every item with frequency above
	// N/m is monitored. Range 1..65536. Default 32.
	Capacity int
}

func (p TopKParams) withDefaults() TopKParams {
	p.Capacity = cmp.Or(p.Capacity, 32)
	return p
}

// Validate reports every problem with p at once, wrapping ErrInvalidSpec.
func (p TopKParams) Validate() error {
	p = p.withDefaults()
	e := check.For("sketch.TopKParams")
	e.Check(p.Capacity >= 1 && p.Capacity <= 1<<16, "Capacity", "%d must be in [1, 65536]", p.Capacity)
	return e.Err()
}

// Counter is one monitored item: Count-Err <= true frequency <= Count.
type Counter struct {
	Hash  uint64
	Count uint64
	Err   uint64
}

// TopK is a Space-Saving summary of weighted item hashes.
//
// Guarantees (Metwally et al., ICDT 2005), for a summary built by Add only:
// the counts sum to N; Count-Err <= f <= Count for every monitored item;
// an unmonitored item has f <= ErrorBound() <= N/Capacity. After Merge the
// per-counter bounds and the unmonitored bound still hold, but counts need
// not sum to N (see Merge).
//
// Order-dependent: the state depends on the order of Adds (and of Merges).
// For results independent of arrival order, apply events in a canonical
// order (the pipeline applies them in (time, tie-break) order). Ties between
// equal counts are broken by the smaller hash, so a decoded summary evicts
// exactly what the original would. Cost: Add O(log Capacity), memory about
// 40 bytes per counter. Not safe for concurrent use.
type TopK struct {
	capacity int
	n        uint64
	floor    uint64 // frequency bound for unmonitored items while not full
	// heap is a min-heap by (Count, Hash); index maps a hash to its slot.
	heap  []Counter
	index map[uint64]int32
}

// NewTopK returns an empty summary, or an error wrapping ErrInvalidSpec.
func NewTopK(p TopKParams) (*TopK, error) {
	if err := p.Validate(); err != nil {
		return nil, err
	}
	p = p.withDefaults()
	return &TopK{capacity: p.Capacity, index: make(map[uint64]int32)}, nil
}

// Params returns the parameters.
func (s *TopK) Params() TopKParams { return TopKParams{Capacity: s.capacity} }

func less(a, b Counter) bool {
	return a.Count < b.Count || (a.Count == b.Count && a.Hash < b.Hash)
}

func (s *TopK) swap(i, j int) {
	s.heap[i], s.heap[j] = s.heap[j], s.heap[i]
	s.index[s.heap[i].Hash] = int32(i)
	s.index[s.heap[j].Hash] = int32(j)
}

func (s *TopK) down(i int) {
	for {
		l := 2*i + 1
		if l >= len(s.heap) {
			return
		}
		c := l
		if r := l + 1; r < len(s.heap) && less(s.heap[r], s.heap[l]) {
			c = r
		}
		if !less(s.heap[c], s.heap[i]) {
			return
		}
		s.swap(i, c)
		i = c
	}
}

func (s *TopK) up(i int) {
	for i > 0 {
		p := (i - 1) / 2
		if !less(s.heap[i], s.heap[p]) {
			return
		}
		s.swap(i, p)
		i = p
	}
}

// Add counts item h w more times (w >= 1; w = 0 is ignored).
func (s *TopK) Add(h uint64, w uint64) {
	if w == 0 {
		return
	}
	s.n = sat.AddU64(s.n, w)
	if i, ok := s.index[h]; ok {
		s.heap[i].Count = sat.AddU64(s.heap[i].Count, w)
		s.down(int(i))
		return
	}
	if len(s.heap) < s.capacity {
		s.heap = append(s.heap, Counter{Hash: h, Count: sat.AddU64(s.floor, w), Err: s.floor})
		s.index[h] = int32(len(s.heap) - 1)
		s.up(len(s.heap) - 1)
		return
	}
	// Replace the minimum counter: the new item inherits its count as error.
	m := s.heap[0]
	delete(s.index, m.Hash)
	s.heap[0] = Counter{Hash: h, Count: sat.AddU64(m.Count, w), Err: m.Count}
	s.index[h] = 0
	s.down(0)
}

// Count returns N, the sum of weights added (and merged).
func (s *TopK) Count() uint64 { return s.n }

// Len returns the number of monitored items.
func (s *TopK) Len() int { return len(s.heap) }

// ErrorBound returns the largest possible frequency of an unmonitored item,
// which also bounds every counter's Err: the minimum counter once full (at
// most N/Capacity for a summary built by Add).
func (s *TopK) ErrorBound() uint64 {
	if len(s.heap) == s.capacity {
		return s.heap[0].Count
	}
	return s.floor
}

// Estimate returns item h's counter, or false and a counter with Count =
// ErrorBound() (its frequency is at most that) if h is not monitored.
func (s *TopK) Estimate(h uint64) (Counter, bool) {
	if i, ok := s.index[h]; ok {
		return s.heap[i], true
	}
	return Counter{Hash: h, Count: s.ErrorBound(), Err: s.ErrorBound()}, false
}

func cmpCounterDesc(a, b Counter) int {
	if c := cmp.Compare(b.Count, a.Count); c != 0 {
		return c
	}
	return cmp.Compare(a.Hash, b.Hash)
}

// Top appends the k largest counters to dst, by Count descending then Hash
// ascending, and returns it.
func (s *TopK) Top(dst []Counter, k int) []Counter {
	start := len(dst)
	dst = append(dst, s.heap...)
	slices.SortFunc(dst[start:], cmpCounterDesc)
	return dst[:start+min(k, len(s.heap))]
}

// TopShare returns the largest counter's Count/N: an upper bound on the
// share of the most frequent item, within ErrorBound()/N of it when the item
// is the true most frequent one. It is 0 when empty.
func (s *TopK) TopShare() float64 {
	if s.n == 0 || len(s.heap) == 0 {
		return 0
	}
	var top Counter
	for _, c := range s.heap {
		if cmpCounterDesc(c, top) < 0 || top.Count == 0 {
			top = c
		}
	}
	return float64(top.Count) / float64(s.n)
}

// Merge combines o into s: an item missing from one side is charged that
// side's ErrorBound as both count and error, the two sides are added, and
// the Capacity largest counters are kept. Afterwards Count >= f and
// Count-Err <= f still hold for every kept item, and every other item has
// f <= ErrorBound() (each kept count is at least the sum of both bounds).
// Merge is commutative but not associative, and the error grows with each
// merge (Agarwal, Cormode, Huang, Phillips, Wei, Yi, "Mergeable summaries",
// PODS 2012, discuss bounded-error merges of such summaries). Capacities
// must match (ErrIncompatible otherwise, s unchanged).
func (s *TopK) Merge(o *TopK) error {
	if s.capacity != o.capacity {
		return fmt.Errorf("top-k merge: capacity %d vs %d: %w", s.capacity, o.capacity, ErrIncompatible)
	}
	bs, bo := s.ErrorBound(), o.ErrorBound()
	all := make([]Counter, 0, len(s.heap)+len(o.heap))
	for _, c := range s.heap {
		if oc, ok := o.index[c.Hash]; ok {
			x := o.heap[oc]
			all = append(all, Counter{c.Hash, sat.AddU64(c.Count, x.Count), sat.AddU64(c.Err, x.Err)})
		} else {
			all = append(all, Counter{c.Hash, sat.AddU64(c.Count, bo), sat.AddU64(c.Err, bo)})
		}
	}
	for _, c := range o.heap {
		if _, ok := s.index[c.Hash]; !ok {
			all = append(all, Counter{c.Hash, sat.AddU64(c.Count, bs), sat.AddU64(c.Err, bs)})
		}
	}
	slices.SortFunc(all, cmpCounterDesc)
	if len(all) > s.capacity {
		all = all[:s.capacity]
	}
	s.n = sat.AddU64(s.n, o.n)
	s.floor = sat.AddU64(bs, bo)
	s.setCounters(all)
	return nil
}

// setCounters rebuilds the heap and index from cs.
func (s *TopK) setCounters(cs []Counter) {
	s.heap = append(s.heap[:0], cs...)
	clear(s.index)
	for i, c := range s.heap {
		s.index[c.Hash] = int32(i)
	}
	for i := len(s.heap)/2 - 1; i >= 0; i-- {
		s.down(i)
	}
}

// Reset empties the summary.
func (s *TopK) Reset() {
	s.heap = s.heap[:0]
	clear(s.index)
	s.n, s.floor = 0, 0
}

// SizeBytes approximates the heap footprint in bytes.
func (s *TopK) SizeBytes() int { return 96 + 24*cap(s.heap) + 24*len(s.index) }

// AppendBinary appends the encoding of s (see UnmarshalBinary).
func (s *TopK) AppendBinary(dst []byte) ([]byte, error) {
	dst = append(dst, formatVersion1, kindTopK)
	dst = binary.AppendUvarint(dst, uint64(s.capacity))
	dst = binary.AppendUvarint(dst, s.n)
	dst = binary.AppendUvarint(dst, s.floor)
	cs := s.Top(nil, len(s.heap))
	dst = binary.AppendUvarint(dst, uint64(len(cs)))
	for _, c := range cs {
		dst = appendU64(dst, c.Hash)
		dst = binary.AppendUvarint(dst, c.Count)
		dst = binary.AppendUvarint(dst, c.Err)
	}
	return dst, nil
}

// UnmarshalBinary replaces s with the decoded summary. On error s is
// unchanged.
//
// Version 1 layout:
//
//	byte     version = 1 (ErrUnknownVersion otherwise)
//	byte     kind = 3 (Space-Saving)
//	uvarint  Capacity (1..65536)
//	uvarint  N, total weight
//	uvarint  floor: frequency bound for unmonitored items while not full
//	uvarint  n counters (<= Capacity), then n times, ordered by Count
//	         descending then hash ascending (strictly):
//	8 bytes  item hash (XXH64 seed 0 of the item), big endian
//	uvarint  Count (floor <= Count <= N, Count >= 1)
//	uvarint  Err (<= Count)
//
// Trailing bytes return ErrTrailingBytes; anything else malformed
// ErrCorrupt.
func (s *TopK) UnmarshalBinary(b []byte) error { return named("top-k", s.unmarshal(b)) }

func (s *TopK) unmarshal(b []byte) error {
	r := header(&wire.Decoder{B: b}, kindTopK)
	if r.Err != nil {
		return r.Err
	}
	capacity := r.Uvarint()
	n := r.Uvarint()
	floor := r.Uvarint()
	if r.Err == nil && (capacity < 1 || capacity > 1<<16) {
		r.Fail("capacity %d", capacity)
	}
	cnt := r.Count(10, capacity)
	cs := make([]Counter, 0, cnt)
	for i := range cnt {
		c := Counter{Hash: r.Uint64BE(), Count: r.Uvarint(), Err: r.Uvarint()}
		if r.Err != nil {
			break
		}
		if c.Count == 0 || c.Count > n || c.Err > c.Count || c.Count < floor ||
			(i > 0 && cmpCounterDesc(cs[i-1], c) >= 0) {
			r.Fail("counter %d %+v", i, c)
			break
		}
		cs = append(cs, c)
	}
	if err := r.Finish(); err != nil {
		return err
	}
	seen := make(map[uint64]bool, len(cs))
	for _, c := range cs {
		if seen[c.Hash] {
			return corruptf("duplicate hash %#x", c.Hash)
		}
		seen[c.Hash] = true
	}
	ns := &TopK{capacity: int(capacity), n: n, floor: floor, index: make(map[uint64]int32, len(cs))}
	ns.setCounters(cs)
	*s = *ns
	return nil
}
