package kindtest

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"strings"
	"time"

	"github.com/tallyward/tallyward"
)

// The three features of the kind under test, in row order.
var featureNames = [...]string{"all", "before", "some"}

const (
	fAll = iota
	fBefore
	fSome
)

// spec is the pipeline definition every check runs: entity "k" with the
// three features of the kind, and, if obs is not nil, entity "order"
// (same key) whose one feature records the order events are applied in.
func spec(c *Config, emit func(tallyward.Row[ev]), obs *observer) tallyward.Spec[ev] {
	f := func(name string) tallyward.Feature[ev] {
		ft := tallyward.Feature[ev]{Name: name, Kind: c.Kind}
		if c.Kind.Inputs()&tallyward.TakesValue != 0 {
			ft.Value = func(e ev) float64 { return e.Value }
		}
		if c.Kind.Inputs()&tallyward.TakesItem != 0 {
			ft.Item = func(e ev) string { return e.Item }
		}
		return ft
	}
	feats := []tallyward.Feature[ev]{f(featureNames[fAll]), f(featureNames[fBefore]), f(featureNames[fSome])}
	feats[fBefore].BeforeEvent = true
	feats[fSome].Where = func(e ev) bool { return e.pick }
	key := func(e ev) string { return e.Key }
	s := tallyward.Spec[ev]{
		Time:     func(e ev) int64 { return e.Time },
		Emit:     emit,
		Entities: []tallyward.Entity[ev]{{Name: "k", Key: key, Features: feats}},
	}
	if obs != nil {
		s.Entities = append(s.Entities, tallyward.Entity[ev]{Name: "order", Key: key, Features: []tallyward.Feature[ev]{
			{Name: "seq", Kind: obs, Value: func(e ev) float64 { return float64(e.ID) }},
		}})
	}
	return s
}

// options are the pipeline options of a run. tiny sets a one-byte cache,
// so that every access to another key decodes its stored record.
func options(c *Config, mode tallyward.Mode, tiny bool) tallyward.Options {
	o := tallyward.Options{
		Mode:        mode,
		MaxDisorder: c.MaxDisorder,
		// The generated silences may exceed any default skew; the harness
		// never sends a future event on purpose.
		FutureSkew: time.Duration(math.MaxInt64),
		// The live check's clock stands at the newest event time: events
		// of a long stream lie far behind it.
		PastSkew:    -1,
		CommitEvery: max(c.Events/5, 1),
		// Runs compared with each other hash items alike.
		ItemKey: []byte("kindtest item ke"),
	}
	if tiny {
		o.CacheBytes = 1
	}
	return o
}

// observer is a kind that records the IDs (its value) of the events the
// pipeline applies, in apply order, into applied. It answers 0.
type observer struct {
	applied []int
}

func (o *observer) Describe() string                               { return "kindtest-apply-order" }
func (o *observer) Validate() error                                { return nil }
func (o *observer) Inputs() tallyward.Inputs                       { return tallyward.TakesValue }
func (o *observer) Reach() time.Duration                           { return time.Nanosecond }
func (o *observer) NewAggregate(time.Duration) tallyward.Aggregate { return &observed{o: o} }

type observed struct {
	o      *observer
	newest int64
	has    bool
}

func (a *observed) Add(t int64, v float64, _ uint64) bool {
	a.o.applied = append(a.o.applied, int(v))
	if !a.has || t > a.newest {
		a.newest, a.has = t, true
	}
	return true
}

func (a *observed) At(int64, uint64) float64 { return 0 }
func (a *observed) Newest() (int64, bool)    { return a.newest, a.has }
func (a *observed) SizeBytes() int           { return 32 }

// AppendBinary: byte version (1), byte has, varint newest.
func (a *observed) AppendBinary(dst []byte) ([]byte, error) {
	dst = append(dst, 1)
	if !a.has {
		return append(dst, 0), nil
	}
	return binary.AppendVarint(append(dst, 1), a.newest), nil
}

func (a *observed) UnmarshalBinary(b []byte) error {
	if len(b) < 2 || b[0] != 1 || b[1] > 1 {
		return errors.New("kindtest: bad observer encoding")
	}
	if b[1] == 0 {
		if len(b) != 2 {
			return errors.New("kindtest: bad observer encoding")
		}
		a.newest, a.has = 0, false
		return nil
	}
	t, n := binary.Varint(b[2:])
	if n <= 0 || 2+n != len(b) {
		return errors.New("kindtest: bad observer encoding")
	}
	a.newest, a.has = t, true
	return nil
}

// rowLog keeps emitted rows as text keyed by sequence number, with values
// as IEEE-754 bits so that comparisons are bit-exact.
type rowLog struct {
	rows  map[uint64]string
	order []uint64
	byID  map[int]string
}

func newRowLog() *rowLog { return &rowLog{rows: map[uint64]string{}, byID: map[int]string{}} }

func (l *rowLog) add(r tallyward.Row[ev]) {
	var b strings.Builder
	fmt.Fprintf(&b, "id=%d t=%d late=%v", r.Event.ID, r.Time, r.Late)
	for _, v := range r.Values {
		fmt.Fprintf(&b, " %016x", math.Float64bits(v))
	}
	l.rows[r.Seq] = b.String()
	l.byID[r.Event.ID] = b.String()
	l.order = append(l.order, r.Seq)
}

// source yields evs from position from on.
func source(evs []ev, from uint64) tallyward.Source[ev] {
	return func(yield func(ev, error) bool) {
		for _, e := range evs[min(from, uint64(len(evs))):] {
			if !yield(e, nil) {
				return
			}
		}
	}
}

// firstDiff describes the first difference between two row maps.
func firstDiff[K comparable](want, got map[K]string, keys func() []K) string {
	for _, k := range keys() {
		if w, g := want[k], got[k]; w != g {
			return fmt.Sprintf("at %v:\n  want %q\n  got  %q", k, w, g)
		}
	}
	return fmt.Sprintf("row counts differ: want %d, got %d", len(want), len(got))
}
