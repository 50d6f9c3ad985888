package window

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

	"github.com/tallyward/tallyward/internal/sat"
)

// floorOf is the oldest pane retained for a given cutoff.
func (g *ring) floorOf(cutoff int64) int64 { return sat.Sub(g.paneOf(cutoff), g.sh.n-1) }

// checkInvariants asserts the invariants written on ring.
func (g *ring) checkInvariants() error {
	if !g.seen {
		if g.panes.len() != 0 || g.raw.len() != 0 || g.total != 0 {
			return errors.New("unseen ring holds events")
		}
		return nil
	}
	c := g.cutoff()
	pc, floor := g.paneOf(c), g.floorOf(c)
	var sum uint64
	for i, p := range g.panes.live() {
		if p.n == 0 || p.idx < floor || p.idx > pc {
			return fmt.Errorf("pane %d = %+v outside [%d, %d] or empty", i, p, floor, pc)
		}
		if i > 0 && g.panes.live()[i-1].idx >= p.idx {
			return fmt.Errorf("panes out of order at %d", i)
		}
		sum += p.n
	}
	for i, e := range g.raw.live() {
		if e.t <= c || e.t > g.maxT {
			return fmt.Errorf("raw %d at %d outside (%d, %d]", i, e.t, c, g.maxT)
		}
		if i > 0 && g.raw.live()[i-1].t > e.t {
			return fmt.Errorf("raw out of order at %d", i)
		}
	}
	if g.total != sum+uint64(g.raw.len()) {
		return fmt.Errorf("total %d != panes %d + raw %d", g.total, sum, g.raw.len())
	}
	return nil
}

// naiveSliding keeps every accepted event and recomputes answers from the
// definitions in the SlidingCount doc comment.
type naiveSliding struct {
	spec   SlidingSpec
	op     op
	seen   bool
	maxT   int64
	events []event // accepted, in arrival order
}

func (m *naiveSliding) pane(t int64) int64 { return sat.FloorDiv(t, int64(m.spec.Resolution)) }
func (m *naiveSliding) n() int64           { return int64(m.spec.Window) / int64(m.spec.Resolution) }
func (m *naiveSliding) cutoff() int64      { return m.maxT - int64(m.spec.Horizon) }
func (m *naiveSliding) floor() int64       { return m.pane(m.cutoff()) - m.n() + 1 }

func (m *naiveSliding) add(t int64, v float64) bool {
	if m.seen && t <= m.cutoff() && m.pane(t) < m.floor() {
		return false
	}
	if !m.seen || t > m.maxT {
		m.seen, m.maxT = true, t
	}
	m.events = append(m.events, event{t, v})
	return true
}

// selected returns the events an as-of query at t must aggregate, in time
// order (stable for ties).
func (m *naiveSliding) selected(t int64, panes int64) []event {
	var out []event
	if !m.seen {
		return nil
	}
	r := int64(m.spec.Resolution)
	for _, e := range m.events {
		if t >= m.cutoff() {
			// [paneStart(t) − Window + r, t], with Window = panes·r.
			if e.t >= m.pane(t)*r-panes*r+r && e.t <= t {
				out = append(out, e)
			}
		} else if p := m.pane(e.t); p >= m.pane(t)-panes+1 && p >= m.floor() && p < m.pane(t) {
			out = append(out, e)
		}
	}
	slices.SortStableFunc(out, func(a, b event) int { return int(a.t - b.t) })
	return out
}

func aggregate(o op, es []event) (uint64, float64) {
	var v float64
	for i, e := range es {
		if i == 0 {
			v = e.v
		} else {
			v = o.merge(v, e.v)
		}
	}
	return uint64(len(es)), v
}

// randomSpec draws a small spec; times are in arbitrary units of ns.
func randomSpec(rng *rand.Rand) SlidingSpec {
	r := int64(1 + rng.IntN(10))
	return SlidingSpec{Resolution: time.Duration(r), Window: time.Duration(r * int64(1+rng.IntN(8))), Horizon: time.Duration(int64(rng.IntN(40)))}
}

// randomStream draws times that mostly increase, with some disorder beyond
// the horizon, some ties and some negative times.
func randomStream(rng *rand.Rand, n int) []int64 {
	ts := make([]int64, n)
	t := int64(rng.IntN(200)) - 100
	for i := range ts {
		t += int64(rng.IntN(8))
		ts[i] = t - int64(rng.ExpFloat64()*6)
		if rng.IntN(10) == 0 {
			ts[i] = t - int64(rng.IntN(100))
		}
	}
	return ts
}

// TestSlidingFastVsNaive checks every sliding aggregate against a brute-force
// recomputation from the accepted raw events, over 10k seeded streams with
// out-of-order events and as-of queries in the past and the future, and
// checks that encoding round-trips at random points.
func TestSlidingFastVsNaive(t *testing.T) {
	for _, o := range []op{opCount, opSum, opMin, opMax} {
		t.Run(fmt.Sprint(o), func(t *testing.T) {
			for seed := range uint64(2500) {
				rng := rand.New(rand.NewPCG(seed, uint64(o)))
				spec := randomSpec(rng)
				checkSlidingStream(t, rng, spec, o, seed)
			}
		})
	}
}

func checkSlidingStream(t *testing.T, rng *rand.Rand, spec SlidingSpec, o op, seed uint64) {
	t.Helper()
	g := &ring{}
	g.init(spec, o, kindSlidingCount+byte(o))
	m := &naiveSliding{spec: spec, op: o}
	for i, ts := range randomStream(rng, 1+rng.IntN(60)) {
		v := float64(rng.IntN(2001) - 1000)
		if got, want := g.add(ts, v), m.add(ts, v); got != want {
			t.Fatalf("seed %d %v: add #%d(%d) = %v, want %v", seed, spec, i, ts, got, want)
		}
		if err := g.checkInvariants(); err != nil {
			t.Fatalf("seed %d %v after add #%d: %v", seed, spec, i, err)
		}
		if rng.IntN(8) == 0 {
			roundTrip(t, g)
		}
		for range 3 {
			q := m.maxT - int64(rng.IntN(int(int64(spec.Horizon)+int64(spec.Window))*2+1)) + int64(rng.IntN(10))
			w := g.sh.n
			if rng.IntN(3) == 0 {
				w = 1 + rng.Int64N(g.sh.n)
			}
			gn, gv := g.query(q, w)
			mn, mv := aggregate(o, m.selected(q, w))
			if gn != mn || (gn > 0 && o != opCount && gv != mv) {
				t.Fatalf("seed %d %v: query(%d, %d panes) after add #%d = (%d, %v), want (%d, %v)",
					seed, spec, q, w, i, gn, gv, mn, mv)
			}
		}
	}
}

func roundTrip(t *testing.T, g *ring) {
	t.Helper()
	h := &ring{}
	h.initLike(g.sh)
	h.add(12345, 1) // dirty state must be replaced
	roundTripCodec(t, g, h, func() bool {
		return h.seen == g.seen && h.maxT == g.maxT && h.total == g.total &&
			slices.Equal(h.panes.live(), g.panes.live()) && slices.Equal(h.raw.live(), g.raw.live())
	})
}

// TestSlidingTrailingEdge pins the trailing-edge error stated in the
// SlidingCount doc: the span (t − Window, paneStart(t) − Window + r) is
// missed, r − 1 ns at the start of a pane, nothing at its last nanosecond.
func TestSlidingTrailingEdge(t *testing.T) {
	spec := SlidingSpec{Window: 60, Resolution: 10, Horizon: 1000}
	c := must(NewSlidingCount(spec))
	for _, ts := range []int64{100, 101, 109, 110} {
		c.Add(ts)
	}
	for _, tc := range []struct {
		at   int64
		want uint64
	}{
		{159, 4}, // last ns of pane 15: exact window (99, 159] holds all four
		{160, 1}, // first ns of pane 16: exact (100, 160] holds 101, 109, 110; panes [110, 160] hold 110
		{165, 1}, // exact (105, 165] holds 109, 110; 109 is in the missed span (105, 110)
		{169, 1}, // last ns of pane 16: exact (109, 169] holds 110
		{170, 0}, // exact (110, 170] is empty
		{109, 3}, // never counts 110, newer than t
	} {
		if got := c.CountAt(tc.at); got != tc.want {
			t.Errorf("CountAt(%d) = %d, want %d", tc.at, got, tc.want)
		}
	}
}

func TestSlidingSpecValidate(t *testing.T) {
	err := SlidingSpec{Window: 15, Resolution: 10, Horizon: -1}.Validate()
	if !errors.Is(err, ErrInvalidSpec) {
		t.Fatalf("Validate = %v, want ErrInvalidSpec", err)
	}
	var n int
	for _, e := range err.(interface{ Unwrap() []error }).Unwrap() {
		var se *SpecError
		if errors.As(e, &se) {
			n++
		}
	}
	if n != 2 {
		t.Fatalf("Validate reported %d problems, want 2: %v", n, err)
	}
	if err := (SlidingSpec{Window: 20, Resolution: 10}).Validate(); err != nil {
		t.Fatal(err)
	}
	if _, err := NewSlidingCount(SlidingSpec{}); !errors.Is(err, ErrInvalidSpec) {
		t.Fatalf("NewSlidingCount(zero spec) = %v, want ErrInvalidSpec", err)
	}
	// A zero Resolution means Window/60.
	if c := must(NewSlidingCount(SlidingSpec{Window: 120})); c.Spec().Resolution != 2 {
		t.Fatalf("default Resolution %d, want 2", c.Spec().Resolution)
	}
	var bad SlidingCount // the zero value is unusable but safe
	if bad.Add(1) || bad.CountAt(1) != 0 {
		t.Fatal("zero aggregate accepted an event")
	}
	if _, err := bad.AppendBinary(nil); !errors.Is(err, ErrInvalidSpec) {
		t.Fatalf("AppendBinary = %v", err)
	}
	if err := bad.UnmarshalBinary([]byte{1, 1, 0}); !errors.Is(err, ErrInvalidSpec) {
		t.Fatalf("UnmarshalBinary = %v", err)
	}
}

func TestSlidingExtremeTimes(t *testing.T) {
	c := must(NewSlidingCount(SlidingSpec{Window: 3600e9, Resolution: 60e9, Horizon: math.MaxInt64}))
	for _, ts := range []int64{math.MinInt64, math.MaxInt64, 0, -1, math.MinInt64 + 1} {
		c.Add(ts)
		if err := c.checkInvariants(); err != nil {
			t.Fatal(err)
		}
		roundTrip(t, &c.ring)
		_ = c.CountAt(math.MinInt64)
		_ = c.CountAt(math.MaxInt64)
	}
}
