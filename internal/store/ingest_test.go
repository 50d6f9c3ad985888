package store

import (
	"bytes"
	"cmp"
	"encoding/binary"
	"fmt"
	"math/rand/v2"
	"slices"
	"testing"
)

// TestCollectorSortedMatchesStableSort checks sorted against a reference:
// a stable sort of the writes by key (bytes.Compare), keeping the last
// write of each key. Keys are drawn to hit the radix sort's edges: shared
// prefixes of every length around its seven-byte words, keys that differ
// only by trailing zero bytes, bytes 0 and 0xff, empty keys and repeated
// keys; runs below and above both its comparison cut-off and its switch
// to wider digits.
func TestCollectorSortedMatchesStableSort(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	alphabet := []byte{0, 1, 'a', 'b', 0xff}
	var c collector
	for trial := range 330 {
		type write struct {
			key, val []byte
			del      bool
		}
		var ws []write
		n := r.IntN(200)
		if trial >= 300 {
			n = 4000 + r.IntN(20_000) // 11-bit digits
		}
		stem := bytes.Repeat([]byte{'s'}, r.IntN(40))
		for range n {
			k := slices.Clone(stem[:r.IntN(len(stem)+1)])
			for range r.IntN(6) {
				k = append(k, alphabet[r.IntN(len(alphabet))])
			}
			if trial >= 300 && r.IntN(2) == 0 {
				k = fmt.Appendf(k, "%07d", r.IntN(n)) // digits, as entity keys
			}
			w := write{key: k, val: binary.AppendUvarint(nil, uint64(len(ws))), del: r.IntN(4) == 0}
			ws = append(ws, w)
			if w.del {
				c.Delete(w.key, nil)
			} else {
				c.Set(w.key, w.val, nil)
			}
		}
		want := slices.Clone(ws)
		slices.SortStableFunc(want, func(a, b write) int { return bytes.Compare(a.key, b.key) })
		var last []write
		for i, w := range want {
			if i+1 < len(want) && bytes.Equal(want[i+1].key, w.key) {
				continue
			}
			last = append(last, w)
		}
		got := c.sorted()
		if len(got) != len(last) {
			t.Fatalf("trial %d: %d writes out, want %d", trial, len(got), len(last))
		}
		for i, e := range got {
			w := last[i]
			if !bytes.Equal(c.key(e), w.key) || e.del() != w.del || (!w.del && !bytes.Equal(c.val(e), w.val)) {
				t.Fatalf("trial %d: write %d is %q del=%v val=%v, want %q del=%v val=%v", trial, i, c.key(e), e.del(), c.val(e), w.key, w.del, w.val)
			}
		}
		// The collector is reused after reset, as commits do.
		c.reset()
	}
}

// TestSortWordOrder checks that comparing two keys' sort words agrees
// with bytes.Compare on the keys wherever the words differ, and that equal
// words mean equal keys or keys both longer than seven bytes with the same
// first seven (which the sort compares further on).
func TestSortWordOrder(t *testing.T) {
	r := rand.New(rand.NewPCG(5, 6))
	alphabet := []byte{0, 1, 0x7f, 0x80, 0xff}
	draw := func() []byte {
		k := make([]byte, r.IntN(11))
		for i := range k {
			k[i] = alphabet[r.IntN(len(alphabet))]
		}
		return k
	}
	for range 200_000 {
		a, b := draw(), draw()
		wa, wb := sortWord(a), sortWord(b)
		want := bytes.Compare(a, b)
		switch got := cmp.Compare(wa, wb); {
		case got != 0 && got != want:
			t.Fatalf("%x vs %x: words compare %d, keys %d", a, b, got, want)
		case got == 0 && want != 0 && (len(a) < 8 || len(b) < 8 || !bytes.Equal(a[:7], b[:7])):
			t.Fatalf("%x vs %x: equal words for different keys", a, b)
		}
	}
}

// BenchmarkCollectorSorted sorts a commit shaped like the six-feature
// workload's: 60k records of 100–500 bytes, each with an expiry index
// deletion and set, keys of random entities (the figures in collector's
// doc comment come from it).
func BenchmarkCollectorSorted(b *testing.B) {
	r := rand.New(rand.NewPCG(1, 2))
	val := make([]byte, 500)
	var c collector
	var key []byte
	for range b.N {
		b.StopTimer()
		c.reset()
		for range 60_000 {
			entity := fmt.Sprintf("acct-%07d", r.IntN(1_000_000))
			c.Set(RecordKey(key[:0], "account", entity), val[:100+r.IntN(400)], nil)
			c.Delete(expiryKey(key[:0], int64(r.IntN(100))*1e12, "account", entity), nil)
			c.Set(expiryKey(key[:0], int64(r.IntN(100))*1e12, "account", entity), nil, nil)
		}
		b.StartTimer()
		c.sorted()
	}
}
