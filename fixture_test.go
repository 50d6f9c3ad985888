package tallyward

import (
	"cmp"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// login is the test event: a sign-in attempt. Data are generated, seeded.
type login struct {
	ID      uint64
	T       int64
	Account string
	Addr    string
	OK      bool
	Amount  float64
}

const t0 = int64(1_700_000_000) * int64(time.Second)

// genLogins makes n events in time order with Zipf-distributed keys, then
// perturbs arrival order by up to disorder (no event arrives late).
func genLogins(seed uint64, n int, accounts, addrs uint64, disorder time.Duration) []login {
	r := rand.New(rand.NewPCG(seed, seed^0x9e3779b97f4a7c15))
	za := rand.NewZipf(r, 1.1, 1, accounts-1)
	zi := rand.NewZipf(r, 1.1, 1, addrs-1)
	evs := make([]login, n)
	t := t0
	for i := range evs {
		t += int64(r.IntN(400)) * int64(time.Millisecond) // several events per pane, some ties
		evs[i] = login{
			ID: uint64(i), T: t,
			Account: fmt.Sprintf("acct-%d", za.Uint64()),
			Addr:    fmt.Sprintf("10.0.%d.%d", zi.Uint64()/256, zi.Uint64()%256),
			OK:      r.IntN(4) != 0,
			Amount:  math.Round(r.Float64()*10000) / 100,
		}
	}
	return shuffleWithin(r, evs, disorder)
}

// shuffleWithin reorders evs by arrival key t + U[0, d]: an event can only
// arrive after events at most d newer than it, so none is late when
// MaxDisorder >= d.
func shuffleWithin(r *rand.Rand, evs []login, d time.Duration) []login {
	if d <= 0 {
		return evs
	}
	type keyed struct {
		k int64
		e login
	}
	ks := make([]keyed, len(evs))
	for i, e := range evs {
		ks[i] = keyed{e.T + r.Int64N(int64(d)+1), e}
	}
	slices.SortStableFunc(ks, func(a, b keyed) int { return cmp.Compare(a.k, b.k) })
	out := make([]login, len(evs))
	for i, k := range ks {
		out[i] = k.e
	}
	return out
}

// loginSpec is a small but representative definition: a count per address
// of failures, a count per account of everything.
func loginSpec(emit func(Row[login])) Spec[login] {
	return Spec[login]{
		Time: func(e login) int64 { return e.T },
		Emit: emit,
		Entities: []Entity[login]{
			{Name: "addr", Key: func(e login) string { return e.Addr }, Features: []Feature[login]{
				{Name: "failed_10m", Kind: SlidingCount{Window: 10 * time.Minute, Resolution: 10 * time.Second}, Where: func(e login) bool { return !e.OK }},
				{Name: "all_1m", Kind: SlidingCount{Window: time.Minute, Resolution: time.Second}},
			}},
			{Name: "account", Key: func(e login) string { return e.Account }, Features: []Feature[login]{
				{Name: "logins_1h", Kind: SlidingCount{Window: time.Hour, Resolution: time.Minute}},
				{Name: "prior_1h", Kind: SlidingCount{Window: time.Hour, Resolution: time.Minute}, BeforeEvent: true},
			}},
		},
	}
}

// rowLog records emitted rows as text keyed by sequence number, bit-exact.
type rowLog struct {
	rows  map[uint64]string
	order []uint64
}

func newRowLog() *rowLog { return &rowLog{rows: map[uint64]string{}} }

func (l *rowLog) add(r Row[login]) {
	var b strings.Builder
	fmt.Fprintf(&b, "t=%d late=%v", r.Time, r.Late)
	for _, v := range r.Values {
		fmt.Fprintf(&b, " %x", math.Float64bits(v))
	}
	l.rows[r.Seq] = b.String()
	l.order = append(l.order, r.Seq)
}

// byEvent re-keys rows by event ID, for runs whose arrival order differs.
func (l *rowLog) byEvent(evs []login) map[uint64]string {
	out := make(map[uint64]string, len(l.rows))
	for seq, s := range l.rows {
		out[evs[seq].ID] = s
	}
	return out
}

// testItemKey is the item hash key of every test store that compares its
// rows with another store's: rows of item kinds depend on the key.
var testItemKey = []byte("0123456789abcdef")

// openTest opens a pipeline that is closed when the test ends. Unless
// opts says otherwise, items are hashed under testItemKey.
func openTest(t testing.TB, spec Spec[login], opts Options) *Pipeline[login] {
	t.Helper()
	if opts.ItemKey == nil && !opts.UnkeyedItems {
		opts.ItemKey = testItemKey
	}
	p, err := Open(spec, opts)
	require.NoError(t, err)
	t.Cleanup(func() { p.Close() })
	return p
}

func slice[E any](evs []E) Source[E] {
	return func(yield func(E, error) bool) {
		for _, e := range evs {
			if !yield(e, nil) {
				return
			}
		}
	}
}

// richSpec is loginSpec plus one feature of every other kind, for the
// invariant tests: what holds for counts must hold for all of them.
func richSpec(emit func(Row[login])) Spec[login] {
	s := loginSpec(emit)
	amount := func(e login) float64 { return e.Amount }
	addr := func(e login) string { return e.Addr }
	s.Entities[1].Features = append(s.Entities[1].Features,
		Feature[login]{Name: "amount_sum_1h", Kind: SlidingSum{Window: time.Hour, Resolution: time.Minute}, Value: amount},
		Feature[login]{Name: "amount_max_1h", Kind: SlidingMax{Window: time.Hour, Resolution: time.Minute}, Value: amount},
		Feature[login]{Name: "amount_mean_dec", Kind: Decayed{HalfLife: 30 * time.Minute, Stat: DecayedMean}, Value: amount},
		Feature[login]{Name: "amount_var_dec", Kind: Decayed{HalfLife: 30 * time.Minute, Stat: DecayedVariance}, Value: amount},
		Feature[login]{Name: "burst", Kind: Velocity{Short: 5 * time.Minute, Long: time.Hour, Resolution: time.Minute}},
		Feature[login]{Name: "since_last", Kind: Recency{}},
		Feature[login]{Name: "session", Kind: Recency{Stat: SessionEvents, Gap: 10 * time.Minute}},
		Feature[login]{Name: "addrs_1h", Kind: Distinct{Window: time.Hour, Resolution: time.Minute}, Item: addr},
		Feature[login]{Name: "addr_freq", Kind: Frequency{}, Item: addr},
		Feature[login]{Name: "top_addr_share", Kind: TopShare{Capacity: 8}, Item: addr},
		Feature[login]{Name: "amount_p95", Kind: Quantile{Q: 0.95}, Value: amount},
	)
	return s
}
