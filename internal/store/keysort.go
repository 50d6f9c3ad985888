package store

import (
	"bytes"
	"cmp"
	"encoding/binary"
	"slices"
)

// A commit sorts every write it collected by key, a hundred thousand or
// more each time. A comparison sort of entries reads both keys from the
// arena for each of its n·log n comparisons and walks their shared
// prefix every time (a table's record keys share the tag, the table's
// name and often the start of the entity key): a quarter of a commit's
// goroutine in the six-feature workload. keySorter sorts them by radix
// instead (BenchmarkCollectorSorted: 50-54 ms with slices.SortFunc, 19
// ms this way; the six-feature run's sort 1.28 -> 0.65 s of CPU):
//
//   - At depth d it skips the prefix every key of the run shares, packs
//     the next seven bytes of each key (zero-padded) and how many bytes
//     the key has left (0–7, or 8 for more than seven) into one word,
//     and sorts the run by that word with a stable least-significant-
//     byte radix sort, passing over the bytes in which every word agrees.
//   - Words equal in a run are keys equal so far: if they have more than
//     seven bytes left, the group is sorted again at depth d+7; if not,
//     they are the same key, and they stay in write order.
//   - Runs below radixMin entries are sorted by comparison.
//
// Padded bytes then the length give bytes.Compare's order: a key that
// ends sorts before every longer key it is a prefix of, whatever bytes
// follow in the longer one.

// radixMin is the run length below which a comparison sort is used.
const radixMin = 64

// sortItem is an entry with its sort word at the current depth.
type sortItem struct {
	w uint64
	e entry
}

// keySorter sorts a collector's entries by key.
type keySorter struct {
	c      *collector
	tmp    []sortItem
	counts *[8][2048]uint32
}

// sortByKey orders c.ents by key, writes of one key in write order
// (koff).
func (c *collector) sortByKey() {
	items := make([]sortItem, len(c.ents))
	for i, e := range c.ents {
		items[i].e = e
	}
	s := keySorter{c: c}
	if len(items) >= radixMin {
		s.tmp, s.counts = make([]sortItem, len(items)), new([8][2048]uint32)
	}
	s.sort(items, 0)
	for i := range items {
		c.ents[i] = items[i].e
	}
}

// sort sorts items by key from byte d on; every key has at least d bytes.
func (s *keySorter) sort(items []sortItem, d int) {
	if len(items) < radixMin {
		slices.SortFunc(items, func(a, b sortItem) int {
			if r := bytes.Compare(s.c.key(a.e)[d:], s.c.key(b.e)[d:]); r != 0 {
				return r
			}
			return byWriteOrder(a, b)
		})
		return
	}
	d += s.sharedPrefix(items, d)
	for i := range items {
		items[i].w = sortWord(s.c.key(items[i].e)[d:])
	}
	s.radixSortWords(items, s.tmp[:len(items)])
	for i := 0; i < len(items); {
		j := i + 1
		for j < len(items) && items[j].w == items[i].w {
			j++
		}
		if j-i > 1 {
			if g := items[i:j]; items[i].w&0xff == 8 {
				s.sort(g, d+7)
			} else if !slices.IsSortedFunc(g, byWriteOrder) {
				// The same key: in write order (the radix sort is
				// stable, so this only happens for input not in it).
				slices.SortFunc(g, byWriteOrder)
			}
		}
		i = j
	}
}

func byWriteOrder(a, b sortItem) int { return cmp.Compare(a.e.koff, b.e.koff) }

// sharedPrefix returns the length of the prefix that every key of items
// shares after byte d.
func (s *keySorter) sharedPrefix(items []sortItem, d int) int {
	first := s.c.key(items[0].e)[d:]
	n := len(first)
	for _, it := range items[1:] {
		k := s.c.key(it.e)[d:]
		m := min(n, len(k))
		i := 0
		for i+8 <= m && binary.LittleEndian.Uint64(first[i:]) == binary.LittleEndian.Uint64(k[i:]) {
			i += 8
		}
		for i < m && first[i] == k[i] {
			i++
		}
		if n = i; n == 0 {
			break
		}
	}
	return n
}

// sortWord packs the first seven bytes of b, zero-padded, above how many
// bytes b has (8 for more than seven).
func sortWord(b []byte) uint64 {
	var w uint64
	if len(b) >= 8 {
		return binary.BigEndian.Uint64(b)&^0xff | 8
	}
	for i := range 7 {
		w <<= 8
		if i < len(b) {
			w |= uint64(b[i])
		}
	}
	return w<<8 | uint64(len(b))
}

// radixSortWords sorts items by w, stably, a digit at a time from the
// least significant, skipping the digits in which every word agrees.
// Long runs take 11-bit digits (six passes at most; counts of 2048
// stay in the processor's first caches), short ones bytes (fewer
// counts to clear and sum). tmp is scratch of the same length.
func (s *keySorter) radixSortWords(items, tmp []sortItem) {
	bits := 8
	if len(items) >= 4096 {
		bits = 11
	}
	digits := (64 + bits - 1) / bits
	mask := uint64(1)<<bits - 1
	counts := s.counts[:digits]
	for d := range counts {
		clear(counts[d][:mask+1])
	}
	for _, it := range items {
		w := it.w
		for d := range counts {
			counts[d][w>>(bits*d)&mask]++
		}
	}
	src, dst := items, tmp
	n := uint32(len(items))
	for d := range counts {
		c := counts[d][:mask+1]
		shift := bits * d
		if c[src[0].w>>shift&mask] == n {
			continue // every word has the same digit here
		}
		var sum uint32
		for i := range c {
			c[i], sum = sum, sum+c[i]
		}
		for _, it := range src {
			x := it.w >> shift & mask
			dst[c[x]] = it
			c[x]++
		}
		src, dst = dst, src
	}
	if &src[0] != &items[0] {
		copy(items, src)
	}
}
