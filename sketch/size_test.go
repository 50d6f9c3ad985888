package sketch

import (
	"fmt"
	"math/rand/v2"
	"testing"
)

// TestSmallEncodings: a summary holding 100 items encodes in at most 512
// bytes (the target) for Distinct (exact mode, items spread over the
// window and the Horizon), Quantile, and TopK with 32 counters. A TopK
// with 100 counters stores 100 full 8-byte hashes (about 1 KB) and
// Count-Min's size is set by width*depth, not by the items: both are only
// reported.
func TestSmallEncodings(t *testing.T) {
	rng := rand.New(rand.NewPCG(10, 10))
	d := mustDistinct(t, DistinctSpec{Window: 24 * 3600 * sec, Resolution: 3600 * sec, Horizon: 10 * sec})
	s := mustTopK(t, 100)
	s32 := mustTopK(t, 32)
	q := mustQ(t, QuantileParams{})
	c := mustCM(t, CountMinParams{Epsilon: 0.01, Delta: 0.01})
	t0 := int64(1_767_225_600) * sec
	for i := range 100 {
		h := HashString(fmt.Sprint("item-", i))
		d.Add(t0+rng.Int64N(24*3600*sec), h)
		w := 1 + rng.Uint64N(9)
		s.Add(h, w)
		s32.Add(h, w)
		q.Add(rng.ExpFloat64() * 200)
		c.Add(h, 1)
	}
	for _, x := range []struct {
		name string
		e    encoder
	}{{"distinct", d}, {"topk100", s}, {"topk32", s32}, {"quantiles", q}, {"countmin", c}} {
		b, _ := x.e.AppendBinary(nil)
		t.Logf("%s: %d bytes for 100 items", x.name, len(b))
		if x.name != "countmin" && x.name != "topk100" && len(b) > 512 {
			t.Errorf("%s: %d bytes > 512", x.name, len(b))
		}
	}
}

// InitLike builds a Distinct in place with no allocation, and its first
// two items fit the storage inside the value (a count, not a timing).
func TestDistinctInitInPlaceAllocs(t *testing.T) {
	var d Distinct
	proto := mustDistinct(t, DistinctSpec{Window: 3600 * sec, Resolution: 60 * sec, Horizon: 1})
	got := testing.AllocsPerRun(100, func() {
		d.InitLike(proto)
		d.Add(100*sec, HashString("a"))
		d.Add(101*sec, HashString("b"))
		if d.DistinctAt(101*sec) != 2 {
			t.Fatal("wrong count")
		}
	})
	if got != 0 {
		t.Fatalf("%v allocations per Init and two adds, want 0", got)
	}
}

// The zero value is safe: it refuses adds, answers 0 and neither encodes
// nor merges.
func TestDistinctZeroValue(t *testing.T) {
	var z Distinct
	z.Reset()
	if z.Add(1, 1) || z.DistinctAt(1) != 0 || z.Spec() != (DistinctSpec{}) {
		t.Fatal("zero value misbehaves")
	}
	if _, err := z.AppendBinary(nil); err == nil {
		t.Fatal("zero value encodes")
	}
	if err := z.Merge(&Distinct{}); err == nil {
		t.Fatal("zero values merge")
	}
}

// Decoding a small exact summary into one built in place allocates
// nothing (a count, not a timing): records reloaded from the store cost
// no more than new ones. On refused input the receiver is unchanged.
func TestDistinctDecodeAllocs(t *testing.T) {
	proto := mustDistinct(t, DistinctSpec{Window: 3600 * sec, Resolution: 60 * sec, Horizon: 10 * sec})
	var src Distinct
	src.InitLike(proto)
	src.Add(100*sec, HashString("a"))
	src.Add(200*sec, HashString("b"))
	b, err := src.AppendBinary(nil)
	if err != nil {
		t.Fatal(err)
	}
	var d Distinct
	d.InitLike(proto)
	got := testing.AllocsPerRun(100, func() {
		if err := d.UnmarshalBinary(b); err != nil {
			t.Fatal(err)
		}
	})
	if got != 0 || d.DistinctAt(200*sec) != 2 {
		t.Fatalf("%v allocations per decode (want 0), %d items", got, d.DistinctAt(200*sec))
	}
	before, _ := d.AppendBinary(nil)
	if d.UnmarshalBinary(b[:len(b)-1]) == nil {
		t.Fatal("truncated input accepted")
	}
	if after, _ := d.AppendBinary(nil); string(after) != string(before) || d.DistinctAt(200*sec) != 2 {
		t.Fatal("a refused decode changed the receiver")
	}
}
