package main

import (
	"math/rand/v2"
	"path/filepath"
	"testing"
)

// TestScenarioRuns: the generated files go through the spec file, every
// attack is present, and some feature separates each one (a smoke test of
// the demo, not a claim about real traffic).
func TestScenarioRuns(t *testing.T) {
	evs := generate(rand.New(rand.NewPCG(1, 99)), 300)
	path := filepath.Join(t.TempDir(), "events.jsonl.gz")
	if err := writeEvents(path, evs); err != nil {
		t.Fatal(err)
	}
	rows, names, err := features(path)
	if err != nil {
		t.Fatal(err)
	}
	if len(rows) != len(evs) {
		t.Fatalf("%d rows for %d events", len(rows), len(evs))
	}
	for _, label := range []string{credStuffing, cardTesting, takeover, spamBurst} {
		var att, norm []row
		for _, r := range rows {
			switch r.label {
			case label:
				att = append(att, r)
			case normal:
				norm = append(norm, r)
			}
		}
		best := 0.0
		for j := range names {
			_, det, fpr := bestThreshold(att, norm, j)
			best = max(best, det-fpr)
		}
		if len(att) == 0 || best < 0.5 {
			t.Errorf("%s: %d events, best separation %.2f", label, len(att), best)
		}
	}
}
