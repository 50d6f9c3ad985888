package window

import (
	"cmp"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
	"time"
)

// A 1 h / 1 min sliding count holding 10 events encodes in at most 64
// bytes (target from the design).
func TestSlidingCountEncodedSize(t *testing.T) {
	for _, horizon := range []int64{0, 5 * second, minute} {
		c := must(NewSlidingCount(SlidingSpec{Window: hour, Resolution: minute, Horizon: time.Duration(horizon)}))
		for _, ts := range steadyTimes(10, hour/20, 5*second) {
			c.Add(ts)
		}
		b, _ := c.AppendBinary(nil)
		if len(b) > 64 {
			t.Errorf("horizon %d: %d bytes, want <= 64", horizon, len(b))
		}
	}
}

// Steady-state Add and Reset allocate nothing (a count, not a timing).
func TestAddAllocs(t *testing.T) {
	ts := steadyTimes(1<<12, second, 5*second)
	c := must(NewSlidingCount(benchSpec))
	s := must(NewSlidingMean(benchSpec))
	d := must(NewDecayed(DecaySpec{HalfLife: hour, Horizon: 5 * second}))
	r := must(NewRecency(RecencySpec{Gap: minute, Horizon: 5 * second}))
	warm := func() {
		for _, x := range ts {
			c.Add(x)
			s.Add(x, 1)
			d.Add(x, 1)
			r.Add(x)
		}
	}
	warm()
	if n := testing.AllocsPerRun(5, func() {
		c.Reset()
		s.Reset()
		d.Reset()
		r.Reset()
		warm()
	}); n != 0 {
		t.Errorf("steady state allocates %v times per run", n)
	}
}

func TestAssign(t *testing.T) {
	for _, tc := range []struct{ t, w, want int64 }{
		{0, 10, 0}, {9, 10, 0}, {10, 10, 10}, {-1, 10, -10}, {-10, 10, -10}, {5, 0, 5},
		{math.MinInt64, 10, math.MinInt64}, {math.MaxInt64, 10, math.MaxInt64 - 7},
	} {
		if got := TumblingStart(tc.t, tc.w); got != tc.want {
			t.Errorf("TumblingStart(%d, %d) = %d, want %d", tc.t, tc.w, got, tc.want)
		}
	}
	// Brute force: every s = k·hop with s <= t < s + width.
	for tt := int64(-30); tt <= 30; tt++ {
		for w := int64(1); w <= 12; w++ {
			for hop := int64(1); hop <= 12; hop++ {
				var want []int64
				for s := int64(-60); s <= 60; s++ {
					if s%hop == 0 && s <= tt && tt < s+w {
						want = append(want, s)
					}
				}
				if got := HoppingStarts(nil, tt, w, hop); !slices.Equal(got, want) {
					t.Fatalf("HoppingStarts(%d, %d, %d) = %v, want %v", tt, w, hop, got, want)
				}
			}
		}
	}
	if got := HoppingStarts(nil, 5, 0, 1); len(got) != 0 {
		t.Errorf("HoppingStarts with width 0 = %v", got)
	}
	if got := HoppingStarts(nil, 5, math.MaxInt64, 1); len(got) != 0 {
		t.Errorf("HoppingStarts beyond MaxHoppingOverlap = %d starts", len(got))
	}
	_ = HoppingStarts(nil, math.MinInt64, 100, 7)
	_ = HoppingStarts(nil, math.MaxInt64, 100, 7)
}

// The public wrappers answer what the shared ring computes, and reject
// non-finite values.
func TestSlidingWrappers(t *testing.T) {
	spec := SlidingSpec{Window: 30, Resolution: 10, Horizon: 100}
	sum, mn, mx, me := must(NewSlidingSum(spec)), must(NewSlidingMin(spec)), must(NewSlidingMax(spec)), must(NewSlidingMean(spec))
	for i, v := range []float64{3, -1, 4, 1, 5} {
		for _, a := range []interface{ Add(int64, float64) bool }{sum, mn, mx, me} {
			if !a.Add(int64(i*5), v) {
				t.Fatal("Add rejected a finite value")
			}
		}
	}
	if sum.SumAt(20) != 12 || mn.MinAt(20) != -1 || mx.MaxAt(20) != 5 || me.MeanAt(20) != 12.0/5 || me.CountAt(20) != 5 {
		t.Errorf("got sum %v min %v max %v mean %v", sum.SumAt(20), mn.MinAt(20), mx.MaxAt(20), me.MeanAt(20))
	}
	if sum.Add(1, math.NaN()) || mn.Add(1, math.Inf(1)) || sum.Count() != 5 {
		t.Error("non-finite value accepted")
	}
	if !math.IsNaN(me.MeanAt(-100)) || sum.SumAt(-100) != 0 {
		t.Error("empty window should give NaN mean and 0 sum")
	}
	if n, ok := sum.Newest(); n != 20 || !ok || sum.SizeBytes() <= 0 || sum.Spec() != spec {
		t.Error("accessors")
	}
}

// Integer states depend only on the multiset of events when every event
// arrives within Horizon of the newest: any such arrival order gives the
// same encoding (hence the same answers) for counts, velocity and recency.
func TestArrivalOrderWithinHorizon(t *testing.T) {
	for seed := range uint64(300) {
		rng := rand.New(rand.NewPCG(seed, 11))
		horizon := int64(rng.IntN(30))
		spec := SlidingSpec{Window: 40, Resolution: 5, Horizon: time.Duration(horizon)}
		ts := randomStream(rng, 1+rng.IntN(50))
		slices.Sort(ts)
		var ref [3][]byte
		for trial := range 4 {
			order := slices.Clone(ts)
			if trial > 0 {
				// Arrival key t + jitter in [0, horizon]: an event never
				// arrives after one more than horizon newer.
				key := map[int]int64{}
				idx := make([]int, len(order))
				for i := range idx {
					idx[i] = i
					key[i] = order[i] + rng.Int64N(horizon+1)
				}
				slices.SortStableFunc(idx, func(a, b int) int { return cmp.Compare(key[a], key[b]) })
				for i, j := range idx {
					order[i] = ts[j]
				}
			}
			c := must(NewSlidingCount(spec))
			v := must(NewVelocity(VelocitySpec{Short: 10, Long: 40, Resolution: 5, Horizon: time.Duration(horizon)}))
			r := must(NewRecency(RecencySpec{Gap: 7, Horizon: time.Duration(horizon)}))
			for _, x := range order {
				if !c.Add(x) || !v.Add(x) {
					t.Fatalf("seed %d: event %d dropped within the horizon", seed, x)
				}
				r.Add(x)
			}
			var got [3][]byte
			for i, a := range []codec{c, v, r} {
				got[i], _ = a.AppendBinary(nil)
			}
			if trial == 0 {
				ref = got
			}
			for i := range got {
				if !slices.Equal(got[i], ref[i]) {
					t.Fatalf("seed %d trial %d: aggregate %d encodes %x, in time order %x", seed, trial, i, got[i], ref[i])
				}
			}
		}
	}
}

// Extreme but accepted values never drive the decayed state out of the
// range its decoder accepts.
func TestDecayedExtremeValues(t *testing.T) {
	d := must(NewDecayed(DecaySpec{HalfLife: 10, Horizon: 5, RebaseEvery: maxRebaseEvery}))
	if d.Add(0, 2*MaxDecayedValue) || d.Add(0, math.NaN()) || d.Add(0, math.Inf(-1)) {
		t.Fatal("out-of-range value accepted")
	}
	rng := rand.New(rand.NewPCG(3, 4))
	for i := range 20000 {
		x := MaxDecayedValue
		if rng.IntN(2) == 0 {
			x = -x
		}
		// Many events just behind each landmark, where weights are largest.
		if !d.Add(int64(i/100)*640+639-int64(rng.IntN(3)), x) {
			t.Fatal("in-range value rejected")
		}
	}
	b, _ := d.AppendBinary(nil)
	if err := must(NewDecayed(d.Spec())).UnmarshalBinary(b); err != nil {
		t.Fatalf("state from in-range values does not decode: %v", err)
	}
	if v := d.VarianceAt(d.maxT); math.IsNaN(v) || math.IsInf(v, 0) {
		t.Fatalf("variance %v", v)
	}
}

// InitLike builds an aggregate in place with no allocation (Recency's
// Init needs none), and a first event fits the storage inside the value
// (a count, not a timing).
func TestInitInPlaceAllocs(t *testing.T) {
	spec := SlidingSpec{Window: hour, Resolution: minute, Horizon: 1}
	pc, ps := must(NewSlidingCount(spec)), must(NewSlidingSum(spec))
	pv := must(NewVelocity(VelocitySpec{Short: 5 * time.Minute, Long: time.Hour, Horizon: 1}))
	pd := must(NewDecayed(DecaySpec{HalfLife: hour, Horizon: 1}))
	var c SlidingCount
	var s SlidingSum
	var v Velocity
	var d Decayed
	var r Recency
	got := testing.AllocsPerRun(100, func() {
		c.InitLike(pc)
		s.InitLike(ps)
		v.InitLike(pv)
		d.InitLike(pd)
		if r.Init(RecencySpec{}) != nil {
			t.Fatal("Init failed")
		}
		c.Add(hour)
		s.Add(hour, 2)
		v.Add(hour)
		d.Add(hour, 3)
		r.Add(hour)
	})
	if got != 0 {
		t.Fatalf("%v allocations per InitLike and first Add, want 0", got)
	}
	if c.CountAt(hour) != 1 || s.SumAt(hour) != 2 || d.MeanAt(hour) != 3 || v.Spec() != pv.Spec() {
		t.Fatal("aggregates built in place answer wrongly")
	}
	// Init again empties the value: it answers like a new one.
	if err := c.Init(spec); err != nil || c.CountAt(hour) != 0 {
		t.Fatalf("Init did not empty the count: %v, %d", err, c.CountAt(hour))
	}
	// A zero value stays safe: it refuses adds and answers empty.
	var z SlidingCount
	var zd Decayed
	var zv Velocity
	z.Reset()
	zd.Reset()
	if z.Add(1) || zd.Add(1, 1) || zv.Add(1) || z.CountAt(1) != 0 || z.Spec() != (SlidingSpec{}) || !math.IsNaN(zv.RatioAt(1)) {
		t.Fatal("zero value misbehaves")
	}
	if _, err := z.AppendBinary(nil); err == nil {
		t.Fatal("zero value encodes")
	}
}
