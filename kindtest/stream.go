package kindtest

import (
	"cmp"
	"fmt"
	"math/rand/v2"
	"slices"
	"time"

	"github.com/tallyward/tallyward"
)

// base is the first event time of every stream: a round Unix second, so
// the time grid lines up with epoch-aligned panes.
const base = int64(1_700_000_000) * int64(time.Second)

// ev is the harness's event type.
type ev struct {
	Event
	pick bool // the "some" feature takes it
}

// streamSeed is the seed of stream i of a check; checks use disjoint
// stream sets so that a failure names one seed.
func (c *Config) streamSeed(check, i int) uint64 {
	return c.Seed*1_000_003 + uint64(check)*10_007 + uint64(i)
}

// genStream makes c.Events events in time order (ID = index).
func genStream(c *Config, seed uint64) []ev {
	r := rand.New(rand.NewPCG(seed, 0x6b696e6474657374))
	grid := int64(c.Spacing) / 4
	var weights float64
	for k := range c.Keys {
		weights += 1 / float64(k+1)
	}
	takes := c.Kind.Inputs()
	evs := make([]ev, c.Events)
	t := base + grid*r.Int64N(4)
	for i := range evs {
		switch {
		case i == 0:
		case r.IntN(5) == 0: // a tie
		case r.IntN(64) == 0: // a silence
			t += 80*grid + grid*r.Int64N(5)
		default:
			t += grid * (1 + r.Int64N(4))
		}
		w, k := r.Float64()*weights, 0
		for w -= 1; w > 0 && k < c.Keys-1; w -= 1 / float64(k+1) {
			k++
		}
		e := ev{Event: Event{ID: i, Key: fmt.Sprintf("key-%d", k), Time: t}, pick: r.IntN(3) != 0}
		if takes&tallyward.TakesValue != 0 {
			e.Value = c.Value(r)
		}
		if takes&tallyward.TakesItem != 0 {
			e.Item = c.Item(r)
		}
		evs[i] = e
	}
	return evs
}

// shuffleWithin reorders evs (in time order) by arrival key t + U[0, d]:
// an event arrives after events at most d newer than it, so none is late
// under MaxDisorder >= d.
func shuffleWithin(r *rand.Rand, evs []ev, d time.Duration) []ev {
	type keyed struct {
		k int64
		e ev
	}
	ks := make([]keyed, len(evs))
	for i, e := range evs {
		ks[i] = keyed{e.Time + r.Int64N(int64(d)+1), e}
	}
	slices.SortStableFunc(ks, func(a, b keyed) int { return cmp.Compare(a.k, b.k) })
	out := make([]ev, len(evs))
	for i, k := range ks {
		out[i] = k.e
	}
	return out
}

// arrivals is a stream of check number check, shuffled within MaxDisorder.
func arrivals(c *Config, check, i int) (evs []ev, seed uint64) {
	seed = c.streamSeed(check, i)
	evs = genStream(c, seed)
	return shuffleWithin(rand.New(rand.NewPCG(seed, 7)), evs, c.MaxDisorder), seed
}
