package kindtest

import (
	"encoding/binary"
	"errors"
	"fmt"
	"runtime"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/tallyward/tallyward"
)

// A harness is only useful if it fails on wrong kinds: these tests run each
// check against a plain exact count and against copies of it with one
// planted defect each, and expect the right check to fail.

type defect int

const (
	sound        defect = iota
	countsNewer         // At ignores t: counts events newer than asked
	forgets             // the encoding drops every event
	trailingOK          // the decoder accepts trailing bytes
	refusesLate         // Add refuses events older than the newest
	encodeEffect        // encoding has a side effect on answers (commit timing leaks in)
	shortReach          // claims a reach of 1 s but counts all history
	anyVersion          // the decoder ignores the version byte
)

// encodes counts AppendBinary calls of encodeEffect aggregates: commits
// happen every so many arrivals, so answers that read it depend on
// arrival order even in Settled mode.
var encodes int

// rawCount counts events at or before t, keeping every event time.
type rawCount struct{ bug defect }

func (k rawCount) Describe() string       { return fmt.Sprintf("test-raw-count bug=%d", k.bug) }
func (rawCount) Validate() error          { return nil }
func (rawCount) Inputs() tallyward.Inputs { return 0 }
func (k rawCount) Reach() time.Duration {
	if k.bug == shortReach {
		return time.Second
	}
	return 0
}
func (k rawCount) NewAggregate(time.Duration) tallyward.Aggregate { return &rawAgg{bug: k.bug} }

type rawAgg struct {
	bug   defect
	times []int64 // sorted
}

func (a *rawAgg) Add(t int64, _ float64, _ uint64) bool {
	if a.bug == refusesLate && len(a.times) > 0 && t < a.times[len(a.times)-1] {
		return false
	}
	i, _ := slices.BinarySearch(a.times, t+1)
	a.times = slices.Insert(a.times, i, t)
	return true
}

func (a *rawAgg) At(t int64, _ uint64) float64 {
	n, _ := slices.BinarySearch(a.times, t+1)
	switch a.bug {
	case countsNewer:
		n = len(a.times)
	case encodeEffect:
		return float64(n) + float64(encodes%2)/2
	}
	return float64(n)
}

func (a *rawAgg) Newest() (int64, bool) {
	if len(a.times) == 0 {
		return 0, false
	}
	return a.times[len(a.times)-1], true
}

func (a *rawAgg) SizeBytes() int { return 48 + 8*cap(a.times) }

// AppendBinary: byte version (1), uvarint n, n varint times.
func (a *rawAgg) AppendBinary(dst []byte) ([]byte, error) {
	if a.bug == encodeEffect {
		encodes++
	}
	dst = append(dst, 1)
	if a.bug == forgets {
		return binary.AppendUvarint(dst, 0), nil
	}
	dst = binary.AppendUvarint(dst, uint64(len(a.times)))
	for _, t := range a.times {
		dst = binary.AppendVarint(dst, t)
	}
	return dst, nil
}

var errBad = errors.New("bad raw count encoding")

func (a *rawAgg) UnmarshalBinary(b []byte) error {
	if len(b) == 0 || b[0] != 1 && a.bug != anyVersion {
		return errBad
	}
	b = b[1:]
	n, k := binary.Uvarint(b)
	if k <= 0 || n > uint64(len(b)) {
		return errBad
	}
	b = b[k:]
	times := make([]int64, n)
	for i := range times {
		if times[i], k = binary.Varint(b); k <= 0 {
			return errBad
		}
		b = b[k:]
	}
	if len(b) != 0 && a.bug != trailingOK {
		return errBad
	}
	a.times = times
	return nil
}

func countRef(past []Event, _ int64, _ Event) float64 { return float64(len(past)) }

// recorder is a tb that records the first failure and ends the check's
// goroutine, as testing.T does.
type recorder struct{ msg string }

func (*recorder) Helper()             {}
func (*recorder) Logf(string, ...any) {}
func (r *recorder) Fatalf(format string, args ...any) {
	r.msg = fmt.Sprintf(format, args...)
	runtime.Goexit()
}

// failure runs check on a kind with bug d and returns its failure, or "".
func failure(d defect, check func(tb, *Config)) string {
	c := Config{Kind: rawCount{bug: d}, Reference: countRef, Events: 200, Streams: 2, Shuffles: 3, Crashes: 2}.withDefaults()
	r := &recorder{}
	done := make(chan struct{})
	go func() {
		defer close(done)
		check(r, &c)
	}()
	<-done
	return r.msg
}

func TestHarnessPassesSoundKind(t *testing.T) {
	Run(t, Config{Kind: rawCount{}, Reference: countRef})
}

func TestHarnessCatchesDefects(t *testing.T) {
	checks := map[string]func(tb, *Config){
		"asof": checkAsOf, "replay-live": checkReplayLive, "shuffle": checkShuffle,
		"crash": checkCrash, "encoding": checkEncoding,
	}
	// Which checks must catch each defect (others may too).
	cases := []struct {
		bug  defect
		must []string
		says string
	}{
		{countsNewer, []string{"asof"}, "reference"},
		{forgets, []string{"asof", "crash", "encoding"}, ""},
		{trailingOK, []string{"encoding"}, "trailing"},
		{refusesLate, []string{"asof", "encoding"}, "refused"},
		{encodeEffect, []string{"asof", "shuffle"}, "arrival order"},
		{shortReach, []string{"asof"}, ""},
		{anyVersion, []string{"encoding"}, "unknown version"},
	}
	for _, c := range cases {
		for _, name := range c.must {
			msg := failure(c.bug, checks[name])
			if msg == "" {
				t.Errorf("defect %d: check %s passed", c.bug, name)
				continue
			}
			if c.says != "" && name != "asof" && !strings.Contains(msg, c.says) {
				t.Errorf("defect %d: check %s failed with %q, want a mention of %q", c.bug, name, msg, c.says)
			}
			t.Logf("defect %d, %s: %s", c.bug, name, firstLine(msg))
		}
	}
	for name, check := range checks {
		if msg := failure(sound, check); msg != "" {
			t.Errorf("sound kind failed %s: %s", name, msg)
		}
	}
}

func firstLine(s string) string {
	line, _, _ := strings.Cut(s, "\n")
	return line
}

func TestConfigValidateReportsAll(t *testing.T) {
	err := Config{Tolerance: -1, Spacing: 2, MaxDisorder: -1, Keys: -1, Events: -1}.Validate()
	for _, want := range []string{"Kind", "Reference", "Tolerance", "Spacing", "MaxDisorder", "Keys", "Events"} {
		if err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("Validate: %v, want a mention of %s", err, want)
		}
	}
}
