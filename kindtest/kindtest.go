package kindtest

import (
	"errors"
	"flag"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/tallyward/tallyward"
)

// Event is one generated event as the reference sees it.
type Event struct {
	// ID is the event's position in its stream in time order (ties in
	// generation order); it is unique within a stream.
	ID int
	// Key is the entity key.
	Key string
	// Time is the event time, Unix ns.
	Time int64
	// Value is what the feature passed to Add: drawn by Config.Value if
	// the kind takes values, otherwise 0.
	Value float64
	// Item is the event's item, drawn by Config.Item if the kind takes
	// items, otherwise "". The aggregate sees the pipeline's hash of it.
	Item string
}

// Reference is the brute-force answer of a kind as of asOf. past holds the
// raw events of the asking event's key that the pipeline had applied to
// the feature with Time <= asOf, sorted by time, events at one time in the
// order the pipeline applied them. asking is the event whose row is being
// checked (for kinds that answer about its item); for a BeforeEvent
// feature asOf is asking.Time − 1, and past excludes the asking event.
//
// It must not keep or modify past.
type Reference func(past []Event, asOf int64, asking Event) float64

// Config describes the kind under test and the size of the run. Only Kind
// and Reference are required; zero fields take their defaults.
type Config struct {
	// Kind is the kind under test. Required.
	Kind tallyward.Kind
	// Reference computes the expected answer. Required.
	Reference Reference
	// Tolerance is the largest accepted difference between an answer and
	// the reference, relative to max(1, |reference|). NaN matches only
	// NaN, an infinity only the same infinity. Default: 0 (exact).
	Tolerance float64
	// Value draws an event's value, for kinds that take values.
	// Default: an integer from 0 to 9.
	Value func(r *rand.Rand) float64
	// Item draws an event's item, for kinds that take items.
	// Default: one of six items, "item-0" to "item-5".
	Item func(r *rand.Rand) string
	// Spacing is the largest gap between consecutive event times of a
	// stream (all keys together). Times fall on a grid of Spacing/4, a
	// fifth of the gaps are 0 (ties), and about one gap in 64 is a
	// silence of 20 to 21 Spacings. Choose it so that a stream of Events
	// events spans several of the kind's windows. Default: 1 s.
	Spacing time.Duration
	// MaxDisorder is the pipeline's MaxDisorder, and how far the arrival
	// order is shuffled. Default: 3·Spacing (0 under InOrder).
	MaxDisorder time.Duration
	// InOrder runs with MaxDisorder 0: events arrive in time order and
	// the horizon is 1 ns. Default: false.
	InOrder bool
	// Keys is the number of entity keys; key k is drawn with weight
	// 1/(k+1). Default: 4.
	Keys int
	// Events is the number of events per stream. Default: 300.
	Events int
	// Streams is the number of streams per check (asof and replay-live
	// run each in both modes). Default: 3, or 2 with -short.
	Streams int
	// Shuffles is the number of reorderings the shuffle check compares.
	// Default: 4.
	Shuffles int
	// Crashes is the number of simulated crashes per mode in the crash
	// check. Default: 3.
	Crashes int
	// Seed seeds every stream. Default: 1.
	Seed uint64
}

// scale multiplies every run's size, for a longer run from the command
// line without editing tests.
var scale = flag.Int("kindtest.scale", 1, "multiply kindtest's Events and Streams by this")

// withDefaults returns c with zero fields set to their defaults.
func (c Config) withDefaults() Config {
	if c.Value == nil {
		c.Value = func(r *rand.Rand) float64 { return float64(r.IntN(10)) }
	}
	if c.Item == nil {
		c.Item = func(r *rand.Rand) string { return fmt.Sprintf("item-%d", r.IntN(6)) }
	}
	if c.Spacing == 0 {
		c.Spacing = time.Second
	}
	if c.MaxDisorder == 0 && !c.InOrder {
		c.MaxDisorder = 3 * c.Spacing
	}
	if c.Keys == 0 {
		c.Keys = 4
	}
	if c.Events == 0 {
		c.Events = 300
	}
	if c.Streams == 0 {
		c.Streams = 3
		if testing.Short() {
			c.Streams = 2
		}
	}
	if c.Shuffles == 0 {
		c.Shuffles = 4
	}
	if c.Crashes == 0 {
		c.Crashes = 3
	}
	if c.Seed == 0 {
		c.Seed = 1
	}
	if *scale > 1 {
		c.Events *= *scale
		c.Streams *= *scale
	}
	return c
}

// Validate reports every problem with c at once.
func (c Config) Validate() error {
	var errs []error
	if c.Kind == nil {
		errs = append(errs, errors.New("kindtest: Config.Kind is required"))
	} else if err := c.Kind.Validate(); err != nil {
		errs = append(errs, fmt.Errorf("kindtest: Config.Kind: %w", err))
	}
	if c.Reference == nil {
		errs = append(errs, errors.New("kindtest: Config.Reference is required"))
	}
	if !(c.Tolerance >= 0) {
		errs = append(errs, fmt.Errorf("kindtest: Tolerance %v must be >= 0", c.Tolerance))
	}
	if c.Spacing < 0 {
		errs = append(errs, fmt.Errorf("kindtest: Spacing %v < 0", c.Spacing))
	} else if c.Spacing > 0 && c.Spacing < 4 {
		errs = append(errs, fmt.Errorf("kindtest: Spacing %v < 4 ns (times fall on a grid of Spacing/4)", c.Spacing))
	}
	if c.MaxDisorder < 0 {
		errs = append(errs, fmt.Errorf("kindtest: MaxDisorder %v < 0", c.MaxDisorder))
	}
	if c.InOrder && c.MaxDisorder != 0 {
		errs = append(errs, fmt.Errorf("kindtest: InOrder with MaxDisorder %v", c.MaxDisorder))
	}
	for name, v := range map[string]int{"Keys": c.Keys, "Events": c.Events, "Streams": c.Streams, "Shuffles": c.Shuffles, "Crashes": c.Crashes} {
		if v < 0 {
			errs = append(errs, fmt.Errorf("kindtest: %s %d < 0", name, v))
		}
	}
	return errors.Join(errs...)
}

// Run runs every check on c as subtests of t: asof, replay-live, shuffle,
// crash and encoding (see the package doc).
func Run(t *testing.T, c Config) {
	t.Helper()
	if err := c.Validate(); err != nil {
		t.Fatal(err)
	}
	c = c.withDefaults()
	t.Run("asof", func(t *testing.T) { checkAsOf(t, &c) })
	t.Run("replay-live", func(t *testing.T) { checkReplayLive(t, &c) })
	t.Run("shuffle", func(t *testing.T) { checkShuffle(t, &c) })
	t.Run("crash", func(t *testing.T) { checkCrash(t, &c) })
	t.Run("encoding", func(t *testing.T) { checkEncoding(t, &c) })
}

// tb is the part of testing.TB the checks use, so the package's own tests
// can run a check against a broken kind and observe that it fails.
type tb interface {
	Helper()
	Fatalf(format string, args ...any)
	Logf(format string, args ...any)
}

// close reports whether got is within c's tolerance of want.
func (c *Config) close(got, want float64) bool {
	switch {
	case math.IsNaN(want) || math.IsNaN(got):
		return math.IsNaN(want) && math.IsNaN(got)
	case math.IsInf(want, 0) || math.IsInf(got, 0):
		return got == want
	case c.Tolerance == 0:
		return got == want
	}
	return math.Abs(got-want) <= c.Tolerance*max(1, math.Abs(want))
}
