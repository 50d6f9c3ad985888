package workload

import (
	"math"
	"slices"
	"testing"
	"time"

	"github.com/tallyward/tallyward"
)

// The two references compute the features the pipeline computes, so the
// speed report compares the same work: every event's six features from a
// pipeline (Eager, in memory) equal the ceiling's and the naive store's.
// Distinct counts above the exact limit are HyperLogLog estimates under
// different item hashes, so they are compared within 4 standard errors
// (1.04/sqrt(4096), Flajolet et al., AofA 2007; 4 sigma is common practice).
func TestReferencesComputeThePipelinesFeatures(t *testing.T) {
	ev := Generate(Params{Accounts: 2000, Devices: 3000, Events: 20_000, Days: 1})
	p, err := tallyward.Open(Spec(nil), tallyward.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	c := NewCeiling()
	n, err := OpenNaive(t.TempDir(), nil)
	if err != nil {
		t.Fatal(err)
	}
	defer n.Close()
	var out []float64
	for i, e := range ev {
		if out, err = p.Score(e, out[:0]); err != nil {
			t.Fatal(err)
		}
		c.Event(e)
		if err := n.Event(e); err != nil {
			t.Fatal(err)
		}
		cl, nl := c.Last(), n.Last()
		if cl != nl {
			t.Fatalf("event %d: ceiling %v, naive %v", i, cl, nl)
		}
		for f, want := range cl {
			tol := 1e-9 * math.Abs(want)
			if f == 2 || f == 5 {
				tol = max(tol, 4*1.04/64*want)
			}
			if math.Abs(out[f]-want) > tol {
				t.Fatalf("event %d feature %d: pipeline %v, references %v", i, f, out[f], want)
			}
		}
	}
}

func TestGenerateIsSeeded(t *testing.T) {
	a := Generate(Params{Accounts: 100, Events: 1000})
	b := Generate(Params{Accounts: 100, Events: 1000})
	if !slices.Equal(a, b) {
		t.Fatal("two generations differ")
	}
	u := Generate(Params{Accounts: 100, Events: 1000, Uniform: true})
	if slices.Equal(a, u) {
		t.Fatal("uniform keys equal Zipf keys")
	}
}

// A population's live set is known: the arrival phase meets every key
// once, the drawn phases only keys already met, times strictly increase,
// and a pipeline with NoExpiry as its TTL ends holding exactly Entities
// records (checked by brute force over the keys).
func TestPopulationLiveSet(t *testing.T) {
	pop := GeneratePopulation(PopulationParams{Entities: 4000, Draws: 6000, Days: 1})
	if pop.Accounts+pop.Devices != 4000 || len(pop.Arrive) != 2000 || len(pop.Zipf) != 6000 || len(pop.Uniform) != 6000 {
		t.Fatalf("sizes: %d accounts, %d devices, phases %d/%d/%d", pop.Accounts, pop.Devices, len(pop.Arrive), len(pop.Zipf), len(pop.Uniform))
	}
	accts, devs := map[string]bool{}, map[string]bool{}
	for _, e := range pop.Arrive {
		if accts[e.Account] || devs[e.Device] {
			t.Fatalf("arrival meets %s/%s twice", e.Account, e.Device)
		}
		accts[e.Account], devs[e.Device] = true, true
	}
	last := int64(0)
	zipfTop := map[string]int{}
	for i, ph := range [][]Payment{pop.Arrive, pop.Zipf, pop.Uniform} {
		for _, e := range ph {
			if !accts[e.Account] || !devs[e.Device] {
				t.Fatalf("phase %d meets a new key %s/%s", i, e.Account, e.Device)
			}
			if e.T <= last {
				t.Fatalf("phase %d: time %d after %d", i, e.T, last)
			}
			last = e.T
			if i == 1 {
				zipfTop[e.Account]++
			}
		}
	}
	if got := time.Duration(last - Start); got != pop.Span || pop.NoExpiry() <= pop.Span {
		t.Fatalf("span %v, recorded %v, no-expiry TTL %v", got, pop.Span, pop.NoExpiry())
	}
	// Zipf(1.1) over 2000 keys: the hottest key draws a share of
	// 1/H(2000, 1.1) ≈ 1/5.9 of the events (H the generalized harmonic
	// number, summed directly), uniform draws about 1/2000; an eighth is a
	// loose check.
	top := 0
	for _, n := range zipfTop {
		top = max(top, n)
	}
	if top < len(pop.Zipf)/8 {
		t.Fatalf("hottest Zipf account drew %d of %d", top, len(pop.Zipf))
	}
	p, err := tallyward.Open(Spec(nil), tallyward.Options{TTL: pop.NoExpiry()})
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	for _, ph := range [][]Payment{pop.Arrive, pop.Zipf, pop.Uniform} {
		for _, e := range ph {
			if err := p.Process(e); err != nil {
				t.Fatal(err)
			}
		}
	}
	if err := p.Commit(nil); err != nil {
		t.Fatal(err)
	}
	if got := p.Stats().LiveEntities; got != 4000 {
		t.Fatalf("pipeline holds %d live entities, want 4000", got)
	}
}

// LoadNew leaves the records Event leaves: both stores then give the same
// features on the drawn events that follow.
func TestLoadNewEqualsEvents(t *testing.T) {
	pop := GeneratePopulation(PopulationParams{Entities: 2000, Draws: 3000, Days: 1})
	a, err := OpenNaive(t.TempDir(), nil)
	if err != nil {
		t.Fatal(err)
	}
	defer a.Close()
	b, err := OpenNaive(t.TempDir(), nil)
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	for _, e := range pop.Arrive {
		if err := a.Event(e); err != nil {
			t.Fatal(err)
		}
	}
	if err := b.LoadNew(pop.Arrive); err != nil {
		t.Fatal(err)
	}
	for i, e := range append(slices.Clone(pop.Zipf), pop.Uniform...) {
		if err := a.Event(e); err != nil {
			t.Fatal(err)
		}
		if err := b.Event(e); err != nil {
			t.Fatal(err)
		}
		if a.Last() != b.Last() {
			t.Fatalf("event %d: %v after events, %v after LoadNew", i, a.Last(), b.Last())
		}
	}
}
