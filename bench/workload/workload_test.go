package workload

import (
	"math"
	"slices"
	"testing"

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
