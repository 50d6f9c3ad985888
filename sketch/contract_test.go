package sketch

import (
	"cmp"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
)

func TestDistinctSpecValidateReportsAll(t *testing.T) {
	err := DistinctSpec{Window: 7, Resolution: 2, Horizon: -1, Precision: 3, ExactLimit: -5}.Validate()
	if !errors.Is(err, ErrInvalidSpec) {
		t.Fatalf("Validate: %v", err)
	}
	// Horizon, Precision and ExactLimit; Window vs Resolution is only judged
	// once the durations themselves are valid.
	if n := len(err.(interface{ Unwrap() []error }).Unwrap()); n != 3 {
		t.Fatalf("%d problems reported, want 3: %v", n, err)
	}
	err = DistinctSpec{Window: 1000, Resolution: 1, Horizon: 0}.Validate()
	if !errors.Is(err, ErrInvalidSpec) {
		t.Fatalf("1001-pane span accepted")
	}
	if _, err := NewDistinct(DistinctSpec{Window: 10, Resolution: 5}); err != nil {
		t.Fatal(err)
	}
}

// TestSentinelErrors: unknown version, trailing bytes and corruption come
// back as the documented sentinels for every kind, and the receiver keeps
// its state.
func TestSentinelErrors(t *testing.T) {
	for _, c := range goldenCases(t) {
		x := c.build()
		blob, _ := x.AppendBinary(nil)
		before := c.render(x)
		bad := slices.Clone(blob)
		bad[0] = 2
		for _, tc := range []struct {
			in   []byte
			want error
		}{
			{bad, ErrUnknownVersion},
			{append(slices.Clone(blob), 0), ErrTrailingBytes},
			{blob[:len(blob)-1], ErrCorrupt},
			{[]byte{1}, ErrCorrupt},
			{[]byte{1, 99}, ErrCorrupt},
		} {
			if err := x.UnmarshalBinary(tc.in); !errors.Is(err, tc.want) {
				t.Errorf("%s: got %v, want %v", c.file, err, tc.want)
			}
			if after := c.render(x); after != before {
				t.Errorf("%s: receiver changed by a failed decode", c.file)
			}
		}
	}
}

// TestSlidingFrontierWorkedExample: inserts (1,3),(2,1),(3,2),(4,1) leave
// the list [(1,3),(3,2),(4,1)]; windows from t>=1, t>=2, t>=4 read 3, 2, 1
// (derived in REFERENCES.md from Chabchoub, Hebrail, "Sliding HyperLogLog",
// IEEE ICDM Workshops 2010). Every insertion order gives the same list.
func TestSlidingFrontierWorkedExample(t *testing.T) {
	ins := [][2]int{{1, 3}, {2, 1}, {3, 2}, {4, 1}}
	perm := []int{0, 1, 2, 3}
	for range 24 {
		r := newSlidingRegs(4, 0)
		for _, i := range perm {
			r.insert(5, int64(ins[i][0]), uint8(ins[i][1]))
		}
		var got [][2]int
		var arr [64]uint16
		for _, e := range r.load(5, arr[:0]) {
			got = append(got, [2]int{int(e & maxPaneOff), int(e >> paneOffBits)})
		}
		if fmt.Sprint(got) != "[[1 3] [3 2] [4 1]]" {
			t.Fatalf("order %v: list %v", perm, got)
		}
		for _, c := range [][2]int{{1, 3}, {2, 2}, {4, 1}, {5, 0}} {
			if v := r.valueFrom(5, int64(c[0])); int(v) != c[1] {
				t.Fatalf("window from %d reads %d, want %d", c[0], v, c[1])
			}
		}
		nextPerm(perm)
	}
}

func nextPerm(p []int) {
	i := len(p) - 2
	for i >= 0 && p[i] >= p[i+1] {
		i--
	}
	if i < 0 {
		slices.Reverse(p)
		return
	}
	j := len(p) - 1
	for p[j] <= p[i] {
		j--
	}
	p[i], p[j] = p[j], p[i]
	slices.Reverse(p[i+1:])
}

// TestSlidingFrontierSpill: a frontier longer than four entries spills and
// still answers like a naive per-register list, and rebase keeps it.
func TestSlidingFrontierSpill(t *testing.T) {
	rng := rand.New(rand.NewPCG(8, 8))
	r := newSlidingRegs(4, 0)
	type pr struct{ pane, rho int }
	var naive []pr
	for range 400 {
		e := pr{rng.IntN(300), 1 + rng.IntN(28)}
		naive = append(naive, e)
		r.insert(2, int64(e.pane), uint8(e.rho))
	}
	check := func(from int) {
		for s := from; s < 310; s += 7 {
			want := 0
			for _, e := range naive {
				if e.pane >= s {
					want = max(want, e.rho)
				}
			}
			if got := r.valueFrom(2, int64(s)); int(got) != want {
				t.Fatalf("window from %d: %d, want %d", s, got, want)
			}
		}
	}
	check(0)
	r.rebase(100)
	check(100)
}

// TestEstimatorSmallRange: with V of m registers empty and the rest at 1,
// the estimator agrees with linear counting m*ln(m/V) (m=16384, V=16000 ->
// 388.57, derived in REFERENCES.md; Flajolet et al., AofA 2007 small-range
// correction) to within 0.5%.
func TestEstimatorSmallRange(t *testing.T) {
	for _, c := range []struct {
		p    uint8
		v    uint32
		want float64
	}{{14, 16000, 388.57}, {4, 8, 11.09}} {
		var hist [64]uint32
		hist[0], hist[1] = c.v, 1<<c.p-c.v
		got := estimateHist(&hist, c.p)
		// At m=16 linear counting is itself rough: allow one standard
		// error 1.04/sqrt(16) there, 0.5% at m=16384.
		tol := 0.005
		if c.p == 4 {
			tol = 0.26
		}
		if math.Abs(got-c.want)/c.want > tol {
			t.Fatalf("p=%d V=%d: %v, linear counting %v", c.p, c.v, got, c.want)
		}
		t.Logf("p=%d V=%d: estimate %.2f, linear counting %.2f", c.p, c.v, got, c.want)
	}
}

// TestTopKCanonicalOrder: Space-Saving is order-dependent, but applying any
// arrival order in the canonical (time, hash) order gives one result.
func TestTopKCanonicalOrder(t *testing.T) {
	rng := rand.New(rand.NewPCG(12, 12))
	evs := make([]event, 3000)
	for i := range evs {
		evs[i] = event{int64(rng.IntN(500)), HashString(fmt.Sprint(rng.IntN(40) * rng.IntN(3)))}
	}
	var first []Counter
	for trial := range 5 {
		rng.Shuffle(len(evs), func(i, j int) { evs[i], evs[j] = evs[j], evs[i] })
		canon := slices.Clone(evs)
		slices.SortFunc(canon, func(a, b event) int {
			if a.t != b.t {
				return int(a.t - b.t)
			}
			return cmp.Compare(a.h, b.h)
		})
		s := mustTopK(t, 8)
		for _, e := range canon {
			s.Add(e.h, 1)
		}
		got := s.Top(nil, 8)
		if trial == 0 {
			first = got
		} else if !slices.Equal(got, first) {
			t.Fatal("canonical order gave different results")
		}
	}
}

// TestDistinctAddTooOld: an add whose pane no allowed query can read
// returns false and changes nothing; times outside ±2^62 are refused.
func TestDistinctAddTooOld(t *testing.T) {
	d := mustDistinct(t, DistinctSpec{Window: 10 * sec, Resolution: sec, Horizon: 2 * sec})
	if !d.Add(100*sec, 1<<40) {
		t.Fatal("first add refused")
	}
	// Oldest readable pane: pane(100s-2s) - 10 + 1 = 89.
	if d.Add(88*sec+sec/2, 2<<40) {
		t.Fatal("add in pane 88 accepted")
	}
	if !d.Add(89*sec, 3<<40) {
		t.Fatal("add in pane 89 refused")
	}
	if got := d.DistinctAt(98 * sec); got != 1 {
		t.Fatalf("DistinctAt(98s) = %d, want 1", got)
	}
	if d.Add(maxTime+1, 4<<40) || d.Add(minTime-1, 4<<40) {
		t.Fatal("time outside ±2^62 accepted")
	}
}

// TestInlineFrontierLanes: the four-lane comparison of an inline frontier
// word answers like a walk of its entries (the reference below) and like
// the maximum over the pairs inserted (brute force), for every window
// start from before the base to past the largest offset.
func TestInlineFrontierLanes(t *testing.T) {
	rng := rand.New(rand.NewPCG(9, 9))
	const regs = 64
	r := newSlidingRegs(6, 1000)
	type pr struct{ pane, rho int }
	naive := make([][]pr, regs)
	for range 300 {
		j := rng.IntN(regs)
		e := pr{1000 + rng.IntN(maxPaneOff+1), 1 + rng.IntN(50)}
		naive[j] = append(naive[j], e)
		r.insert(uint32(j), int64(e.pane), uint8(e.rho))
	}
	inline := 0
	for j := range regs {
		if r.words[j] == spillMark {
			continue
		}
		inline++
		for s := 990; s <= 1000+maxPaneOff+3; s++ {
			want := 0
			for _, e := range naive[j] {
				if e.pane >= s {
					want = max(want, e.rho)
				}
			}
			walk := walkValueFrom(r.words[j], int64(s)-r.base)
			got := r.valueFrom(uint32(j), int64(s))
			if int(got) != want || int(walk) != want {
				t.Fatalf("register %d (word %#x), window from %d: lanes %d, walk %d, brute force %d", j, r.words[j], s, got, walk, want)
			}
		}
	}
	if inline < regs/2 {
		t.Fatalf("only %d of %d registers inline: the test no longer covers the lanes", inline, regs)
	}
}

// walkValueFrom is the entry-by-entry reading of an inline frontier word
// that inlineValueFrom replaces: the reference for the test and the
// benchmark.
func walkValueFrom(w uint64, off int64) uint8 {
	for i := 3; i >= 0; i-- {
		e := uint16(w >> (16 * i))
		if e == 0 {
			return 0
		}
		if int64(e&maxPaneOff) >= off {
			return uint8(e >> paneOffBits)
		}
	}
	return 0
}
