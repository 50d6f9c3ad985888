package window

import (
	"bytes"
	"errors"
	"testing"
	"time"
)

// Fuzz targets for every decoder. The seed corpus (golden blobs plus
// malformed variants) runs with go test; a long run is manual, e.g.
//
//	go test ./window/ -run '^$' -fuzz FuzzDecodeSliding -fuzztime 3m
//
// Each target asserts: no panic; only documented errors; the receiver is
// unchanged on error; accepted input satisfies the invariants and
// re-encodes stably (decode → encode → decode → encode gives equal bytes).

func addSeeds(f *testing.F, a, h uint8, names ...string) {
	for name, build := range goldenStates() {
		for _, n := range names {
			if n != name {
				continue
			}
			b, _ := build().AppendBinary(nil)
			f.Add(b, a, h) // the spec the blob was encoded under
			f.Add(b, uint8(1), uint8(3))
			f.Add(append(bytes.Clone(b), 7), uint8(0), uint8(0))
			f.Add(b[:len(b)-1], uint8(0), uint8(0))
			f.Add(append([]byte{2}, b[1:]...), uint8(0), uint8(0))
		}
	}
	f.Add([]byte{}, uint8(0), uint8(0))
	f.Add([]byte{1, 1, 1, 0, 0, 0}, uint8(2), uint8(0))
}

func checkDecoded(t *testing.T, b []byte, fresh func() codec, invariants func(codec) error) {
	t.Helper()
	recv := fresh()
	before, _ := recv.AppendBinary(nil)
	err := recv.UnmarshalBinary(b)
	if err != nil {
		if !errors.Is(err, ErrCorrupt) && !errors.Is(err, ErrUnknownVersion) &&
			!errors.Is(err, ErrTrailingBytes) && !errors.Is(err, ErrWrongKind) {
			t.Fatalf("undocumented error %v", err)
		}
		after, _ := recv.AppendBinary(nil)
		if !bytes.Equal(before, after) {
			t.Fatalf("receiver changed on error %v", err)
		}
		return
	}
	b1, err := recv.AppendBinary(nil)
	if err != nil {
		t.Fatal(err)
	}
	again := fresh()
	if err := again.UnmarshalBinary(b1); err != nil {
		t.Fatalf("re-decode of %x: %v", b1, err)
	}
	if b2, _ := again.AppendBinary(nil); !bytes.Equal(b1, b2) {
		t.Fatalf("unstable re-encoding %x vs %x", b1, b2)
	}
	// Use the decoded state: queries and adds must keep the invariants, and
	// whatever state they reach must encode to bytes the decoder accepts.
	if err := invariants(recv); err != nil {
		t.Fatalf("decoded %x, used, breaks an invariant: %v", b, err)
	}
	b3, _ := recv.AppendBinary(nil)
	if err := fresh().UnmarshalBinary(b3); err != nil {
		t.Fatalf("state reached from %x encodes to %x, which does not decode: %v", b, b3, err)
	}
}

// fuzzSpec derives a small valid sliding spec from two bytes.
func fuzzSpec(a, h uint8) SlidingSpec {
	r := int64(a&3) + 1
	return SlidingSpec{Resolution: time.Duration(r * minute), Window: time.Duration(r * minute * (int64(a>>2) + 1)), Horizon: time.Duration(int64(h) * 10 * second)}
}

func FuzzDecodeSliding(f *testing.F) {
	addSeeds(f, 236, 9, "v1-sliding-count", "v1-sliding-sum", "v1-sliding-min", "v1-sliding-max",
		"v1-sliding-mean", "v1-velocity", "v1-sliding-count-empty")
	f.Fuzz(func(t *testing.T, b []byte, a, h uint8) {
		spec := fuzzSpec(a, h)
		kinds := []struct {
			o op
			k byte
		}{{opCount, kindSlidingCount}, {opSum, kindSlidingSum}, {opMin, kindSlidingMin},
			{opMax, kindSlidingMax}, {opSum, kindSlidingMean}, {opCount, kindVelocity}}
		for _, kk := range kinds {
			fresh := func() codec {
				g := &ring{}
				g.init(spec, kk.o, kk.k)
				g.add(t0, 1)
				return g
			}
			checkDecoded(t, b, fresh, func(c codec) error {
				g := c.(*ring)
				_, _ = g.query(g.maxT, g.sh.n)
				_, _ = g.query(g.maxT-int64(spec.Horizon)-1, g.sh.n)
				g.add(g.maxT+1, 2)
				g.add(g.maxT-int64(spec.Window), 2)
				return g.checkInvariants()
			})
		}
	})
}

func FuzzDecodeDecayed(f *testing.F) {
	addSeeds(f, 5, 9, "v1-decayed")
	f.Fuzz(func(t *testing.T, b []byte, a, h uint8) {
		spec := DecaySpec{HalfLife: time.Duration(int64(a%7+1) * 10 * second), Horizon: time.Duration(int64(h) * 10 * second), RebaseEvery: int64(a / 7 % 5)}
		fresh := func() codec { d := must(NewDecayed(spec)); d.Add(t0, 1); return d }
		checkDecoded(t, b, fresh, func(c codec) error {
			d := c.(*Decayed)
			_ = d.VarianceAt(d.maxT)
			_ = d.CountAt(d.maxT + hour)
			d.Add(d.maxT+1, MaxDecayedValue)
			d.Add(d.maxT-int64(d.Spec().Horizon), -MaxDecayedValue)
			d.Add(d.maxT+int64(d.Spec().HalfLife)*100, 2)
			return d.checkInvariants()
		})
	})
}

func FuzzDecodeRecency(f *testing.F) {
	addSeeds(f, 2, 9, "v1-recency")
	f.Fuzz(func(t *testing.T, b []byte, a, h uint8) {
		spec := RecencySpec{Gap: time.Duration(int64(a%9+1) * 10 * second), Horizon: time.Duration(int64(h) * 10 * second)}
		fresh := func() codec { r := must(NewRecency(spec)); r.Add(t0); return r }
		checkDecoded(t, b, fresh, func(c codec) error {
			r := c.(*Recency)
			_ = r.SessionCountAt(r.maxT)
			_, _ = r.SinceLastAt(r.maxT - 1)
			r.Add(r.maxT + 1)
			return r.checkInvariants()
		})
	})
}

func FuzzDecodeSurge(f *testing.F) {
	addSeeds(f, 4, 9, "v1-surge", "v1-surge-empty")
	f.Fuzz(func(t *testing.T, b []byte, a, h uint8) {
		r := time.Duration(int64(a&3)+1) * minute
		spec := SurgeSpec{Window: 5 * r, HalfLife: time.Duration(int64(a>>2)+1) * hour, Resolution: r, Horizon: time.Duration(int64(h) * 10 * second)}
		fresh := func() codec { s := must(NewSurge(spec)); s.Add(t0); return s }
		checkDecoded(t, b, fresh, func(c codec) error {
			s := c.(*Surge)
			n, _ := s.Newest()
			_ = s.RatioAt(n)
			_ = s.RatioAt(n - int64(spec.Horizon) - 1)
			s.Add(n + 1)
			s.Add(n - int64(spec.Window))
			if err := s.short.checkInvariants(); err != nil {
				return err
			}
			if err := s.base.checkInvariants(); err != nil {
				return err
			}
			if t1, _ := s.short.Newest(); t1 != s.base.maxT {
				return errors.New("parts disagree on the newest time")
			}
			return nil
		})
	})
}

func (r *Recency) checkInvariants() error {
	if !r.seen {
		if r.folded || r.raw.len() != 0 {
			return errors.New("unseen state not empty")
		}
		return nil
	}
	c := r.cutoff()
	if r.folded && (r.sStart > r.sLast || r.sLast > c || r.sCount == 0 || r.first > r.sStart) {
		return errors.New("folded session out of range")
	}
	for i, e := range r.raw.live() {
		if e.t <= c || e.t > r.maxT || e.t < r.first || (i > 0 && r.raw.live()[i-1].t > e.t) {
			return errors.New("raw event out of range or unsorted")
		}
	}
	return nil
}
