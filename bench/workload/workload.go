// Package workload is the six-feature benchmark workload shared by the
// benchmarks in bench/ and the speed report (bench/report): seeded
// payments over two entity kinds, the feature spec, and the two same-run
// references a pipeline is compared with, a naive per-event Pebble store
// and an exact in-memory ceiling.
//
// Per account: a 10-minute sliding count, a 1-hour sliding sum of the
// amount, 24-hour distinct devices, a decayed mean amount (1-hour
// half-life) and a 5-minute/1-hour velocity; per device: 1-hour distinct
// accounts. An account mostly pays from its own device.
//
// Generate builds every event before any timer; the same Params give the
// same events. Not safe for concurrent use (a Ceiling or Naive belongs to
// one goroutine).
package workload

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"time"
	"unsafe"

	"github.com/cockroachdb/pebble/v2"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/sketch"
)

// Start is the time of the first generated event (Unix ns).
const Start = int64(1_700_000_000) * int64(time.Second)

// Payment is one card payment: who paid, from which device, how much.
type Payment struct {
	T       int64
	Account string
	Device  string
	Amount  float64
}

// Params sizes a workload. Zero fields mean their defaults.
type Params struct {
	// Accounts and Devices are the numbers of distinct keys drawn from.
	// Defaults 200000 and 3 × Accounts.
	Accounts, Devices int
	// Events is the number of payments. Default 5 × Accounts.
	Events int
	// Days is the simulated span; events are evenly spaced. Default 7.
	Days int
	// Uniform draws keys uniformly instead of Zipf(1.1). Default false.
	Uniform bool
}

func (p Params) withDefaults() Params {
	if p.Accounts <= 0 {
		p.Accounts = 200_000
	}
	if p.Devices <= 0 {
		p.Devices = 3 * p.Accounts
	}
	if p.Events <= 0 {
		p.Events = 5 * p.Accounts
	}
	if p.Days <= 0 {
		p.Days = 7
	}
	return p
}

// Generate returns the payments of p, from a fixed seed.
func Generate(p Params) []Payment {
	p = p.withDefaults()
	na, nd, ne := p.Accounts, p.Devices, p.Events
	r := rand.New(rand.NewPCG(9, 9))
	za := rand.NewZipf(r, 1.1, 1, uint64(na-1))
	zd := rand.NewZipf(r, 1.1, 1, uint64(nd-1))
	drawA := func() int { return int(za.Uint64()) }
	drawD := func() int { return int(zd.Uint64()) }
	if p.Uniform {
		drawA = func() int { return r.IntN(na) }
		drawD = func() int { return r.IntN(nd) }
	}
	acct := make([]string, na)
	for i := range acct {
		acct[i] = fmt.Sprintf("acct-%07d", i)
	}
	dev := make([]string, nd)
	for i := range dev {
		dev[i] = fmt.Sprintf("dev-%08d", i)
	}
	span := int64(p.Days) * int64(24*time.Hour)
	ev := make([]Payment, ne)
	for i := range ev {
		a := drawA()
		d := int((uint64(a) * 2654435761) % uint64(nd)) // the account's own device
		if r.IntN(10) == 0 {
			d = drawD()
		}
		ev[i] = Payment{
			T:       Start + int64(i)*(span/int64(ne)),
			Account: acct[a],
			Device:  dev[d],
			Amount:  math.Round(r.ExpFloat64()*5000) / 100,
		}
	}
	ownStrings(ev)
	return ev
}

// ownStrings gives every event its own copy of its keys, laid out in
// event order, as events decoded from a file or a request have them:
// shared from the key tables, reading an event's key for the first time
// would be a cache miss on a table of millions of strings, which no
// decoded stream pays.
func ownStrings(ev []Payment) {
	n := 0
	for _, e := range ev {
		n += len(e.Account) + len(e.Device)
	}
	buf := make([]byte, 0, n)
	cut := func(s string) string {
		at := len(buf)
		buf = append(buf, s...)
		return unsafe.String(unsafe.SliceData(buf[at:]), len(s))
	}
	for i := range ev {
		ev[i].Account = cut(ev[i].Account)
		ev[i].Device = cut(ev[i].Device)
	}
}

// The six features' kinds.
var (
	PayCount    = tallyward.SlidingCount{Window: 10 * time.Minute}
	PaySum      = tallyward.SlidingSum{Window: time.Hour}
	PayDevices  = tallyward.Distinct{Window: 24 * time.Hour}
	PayMean     = tallyward.Decayed{HalfLife: time.Hour, Stat: tallyward.DecayedMean}
	PayVelocity = tallyward.Velocity{Short: 5 * time.Minute, Long: time.Hour}
	DevAccounts = tallyward.Distinct{Window: time.Hour}
)

// Spec is the six-feature spec over payments; emit may be nil.
func Spec(emit func(tallyward.Row[Payment])) tallyward.Spec[Payment] {
	amount := func(p Payment) float64 { return p.Amount }
	return tallyward.Spec[Payment]{
		Time: func(p Payment) int64 { return p.T },
		Emit: emit,
		Entities: []tallyward.Entity[Payment]{
			{Name: "account", Key: func(p Payment) string { return p.Account }, Features: []tallyward.Feature[Payment]{
				{Name: "payments_10m", Kind: PayCount},
				{Name: "amount_1h", Kind: PaySum, Value: amount},
				{Name: "devices_24h", Kind: PayDevices, Item: func(p Payment) string { return p.Device }},
				{Name: "mean_amount", Kind: PayMean, Value: amount},
				{Name: "velocity", Kind: PayVelocity},
			}},
			{Name: "device", Key: func(p Payment) string { return p.Device }, Features: []tallyward.Feature[Payment]{
				{Name: "accounts_1h", Kind: DevAccounts, Item: func(p Payment) string { return p.Account }},
			}},
		},
	}
}

const horizon = time.Nanosecond

func acctAggs() []tallyward.Aggregate {
	return []tallyward.Aggregate{PayCount.NewAggregate(horizon), PaySum.NewAggregate(horizon),
		PayDevices.NewAggregate(horizon), PayMean.NewAggregate(horizon), PayVelocity.NewAggregate(horizon)}
}

func devAggs() []tallyward.Aggregate {
	return []tallyward.Aggregate{DevAccounts.NewAggregate(horizon)}
}

// itemHash is the pipeline's item hash. It must mix every input byte into
// the high bits: a distinct count past its exact limit picks registers from
// them, and a plain FNV-1a of keys that differ only in their last digits
// leaves them nearly equal (it counted 40 of 129 devices).
func itemHash(s string) uint64 { return sketch.HashString(s) }

func applyPayment(a, d []tallyward.Aggregate, e Payment, out *[6]float64) {
	dh, ah := itemHash(e.Device), itemHash(e.Account)
	a[0].Add(e.T, 1, 0)
	a[1].Add(e.T, e.Amount, 0)
	a[2].Add(e.T, 0, dh)
	a[3].Add(e.T, e.Amount, 0)
	a[4].Add(e.T, 1, 0)
	d[0].Add(e.T, 0, ah)
	for i, g := range a {
		out[i] = g.At(e.T, dh)
	}
	out[5] = d[0].At(e.T, ah)
}

// Ceiling keeps the same aggregates per key in Go maps and persists
// nothing: what the workload costs with no store at all.
type Ceiling struct {
	acct, dev map[string][]tallyward.Aggregate
	out       [6]float64
}

// NewCeiling returns an empty ceiling.
func NewCeiling() *Ceiling {
	return &Ceiling{acct: map[string][]tallyward.Aggregate{}, dev: map[string][]tallyward.Aggregate{}}
}

// Event applies e and reads its six features.
func (c *Ceiling) Event(e Payment) {
	a := c.acct[e.Account]
	if a == nil {
		a = acctAggs()
		c.acct[e.Account] = a
	}
	d := c.dev[e.Device]
	if d == nil {
		d = devAggs()
		c.dev[e.Device] = d
	}
	applyPayment(a, d, e, &c.out)
}

// Entities is the number of keys held.
func (c *Ceiling) Entities() int { return len(c.acct) + len(c.dev) }

// SizeBytes is the aggregates' own estimate of their memory.
func (c *Ceiling) SizeBytes() int {
	n := 0
	for _, m := range []map[string][]tallyward.Aggregate{c.acct, c.dev} {
		for k, aggs := range m {
			n += len(k)
			for _, g := range aggs {
				n += g.SizeBytes()
			}
		}
	}
	return n
}

// Naive is the baseline: per event and entity a Pebble Get, a decode of
// every aggregate, the update, an encode and a Set.
type Naive struct {
	db  *pebble.DB
	key []byte
	buf []byte
	one []byte
	out [6]float64
}

// OpenNaive opens the baseline's Pebble store in dir with opts (nil: Pebble's
// defaults).
func OpenNaive(dir string, opts *pebble.Options) (*Naive, error) {
	db, err := pebble.Open(dir, opts)
	if err != nil {
		return nil, err
	}
	return &Naive{db: db}, nil
}

// Close closes the store.
func (n *Naive) Close() error { return n.db.Close() }

// DiskBytes is Pebble's estimate of the store's size.
func (n *Naive) DiskBytes() uint64 { return n.db.Metrics().DiskSpaceUsage() }

var errShort = errors.New("naive: short value")

func (n *Naive) load(key string, fresh func() []tallyward.Aggregate) ([]tallyward.Aggregate, error) {
	aggs := fresh()
	n.key = append(n.key[:0], key...)
	v, closer, err := n.db.Get(n.key)
	if errors.Is(err, pebble.ErrNotFound) {
		return aggs, nil
	}
	if err != nil {
		return nil, err
	}
	defer closer.Close()
	for _, a := range aggs {
		l, k := binary.Uvarint(v)
		if k <= 0 || uint64(len(v)-k) < l {
			return nil, errShort
		}
		if err := a.UnmarshalBinary(v[k : k+int(l)]); err != nil {
			return nil, err
		}
		v = v[k+int(l):]
	}
	return aggs, nil
}

func (n *Naive) save(key string, aggs []tallyward.Aggregate) error {
	if err := n.encode(aggs); err != nil {
		return err
	}
	n.key = append(n.key[:0], key...)
	return n.db.Set(n.key, n.buf, pebble.NoSync)
}

// encode leaves aggs' encoding in n.buf: each aggregate's bytes after
// their length.
func (n *Naive) encode(aggs []tallyward.Aggregate) error {
	n.buf = n.buf[:0]
	var err error
	for _, a := range aggs {
		if n.one, err = a.AppendBinary(n.one[:0]); err != nil {
			return err
		}
		n.buf = binary.AppendUvarint(n.buf, uint64(len(n.one)))
		n.buf = append(n.buf, n.one...)
	}
	return nil
}

// Event loads both entities, applies e, reads its features and stores both.
func (n *Naive) Event(e Payment) error {
	a, err := n.load("a"+e.Account, acctAggs)
	if err != nil {
		return err
	}
	d, err := n.load("d"+e.Device, devAggs)
	if err != nil {
		return err
	}
	applyPayment(a, d, e, &n.out)
	if err := n.save("a"+e.Account, a); err != nil {
		return err
	}
	return n.save("d"+e.Device, d)
}

// Last returns the six features of the last event, in spec order.
func (c *Ceiling) Last() [6]float64 { return c.out }

// Last returns the six features of the last event, in spec order.
func (n *Naive) Last() [6]float64 { return n.out }

// PopulationParams sizes a Population. Zero fields mean their defaults.
type PopulationParams struct {
	// Entities is the number of live entities the stream leaves: half
	// accounts, half devices. Default 1000000.
	Entities int
	// Draws is the number of events of each drawn phase. Default
	// Entities.
	Draws int
	// Days is the simulated span of the whole stream. Default 7.
	Days int
}

func (p PopulationParams) withDefaults() PopulationParams {
	if p.Entities <= 0 {
		p.Entities = 1_000_000
	}
	p.Entities = max(p.Entities&^1, 2)
	if p.Draws <= 0 {
		p.Draws = p.Entities
	}
	if p.Days <= 0 {
		p.Days = 7
	}
	return p
}

// Population is a stream over a known set of entities, in three phases
// whose event times follow one another:
//
//   - Arrive: every event meets a new account and its own new device
//     (Entities/2 events), so after it exactly Entities keys exist;
//   - Zipf: accounts drawn Zipf(1.1) over those accounts, ranks spread
//     over them by a fixed permutation (the hottest account is not the
//     oldest);
//   - Uniform: accounts drawn uniformly over them.
//
// In both drawn phases an account pays from its own device nine times in
// ten and otherwise from a device drawn the same way, so no new key
// appears: with a TTL longer than Span nothing expires, and the live set
// at the end is exactly Entities (Accounts + Devices).
type Population struct {
	Arrive, Zipf, Uniform []Payment
	Accounts, Devices     int
	// Span is the simulated time from the first event to the last.
	Span time.Duration
}

// NoExpiry is a TTL longer than the population's span: with it no record
// expires during the stream.
func (p *Population) NoExpiry() time.Duration { return p.Span + 24*time.Hour }

// GeneratePopulation returns the population of p, from a fixed seed.
func GeneratePopulation(p PopulationParams) *Population {
	p = p.withDefaults()
	n := p.Entities / 2
	acct := make([]string, n)
	dev := make([]string, n)
	for i := range acct {
		acct[i] = fmt.Sprintf("acct-%08d", i)
		dev[i] = fmt.Sprintf("dev-%09d", i)
	}
	total := int64(n + 2*p.Draws)
	span := int64(p.Days) * int64(24*time.Hour)
	step := span / total
	r := rand.New(rand.NewPCG(9, 10))
	amount := func() float64 { return math.Round(r.ExpFloat64()*5000) / 100 }
	pop := &Population{Accounts: n, Devices: n, Span: time.Duration(step * (total - 1))}
	seq := int64(0)
	next := func(a, d int) Payment {
		e := Payment{T: Start + seq*step, Account: acct[a], Device: dev[d], Amount: amount()}
		seq++
		return e
	}
	pop.Arrive = make([]Payment, n)
	for i := range pop.Arrive {
		pop.Arrive[i] = next(i, i)
	}
	// Zipf ranks spread over the keys by multiplication with a constant
	// coprime to n (a permutation of 0..n-1).
	spread := func(mul uint64) func(uint64) int {
		for gcd(mul, uint64(n)) != 1 {
			mul += 2
		}
		return func(k uint64) int { return int(k * mul % uint64(n)) }
	}
	za, zd := rand.NewZipf(r, 1.1, 1, uint64(n-1)), rand.NewZipf(r, 1.1, 1, uint64(n-1))
	pa, pd := spread(2654435761), spread(40503)
	draw := func(acctDraw, devDraw func() int) []Payment {
		ev := make([]Payment, p.Draws)
		for i := range ev {
			a := acctDraw()
			d := a
			if r.IntN(10) == 0 {
				d = devDraw()
			}
			ev[i] = next(a, d)
		}
		return ev
	}
	pop.Zipf = draw(func() int { return pa(za.Uint64()) }, func() int { return pd(zd.Uint64()) })
	pop.Uniform = draw(func() int { return r.IntN(n) }, func() int { return r.IntN(n) })
	return pop
}

func gcd(a, b uint64) uint64 {
	for b != 0 {
		a, b = b, a%b
	}
	return a
}

// LoadNew stores the records of events that each meet only entities the
// store does not hold (a Population's Arrive phase), without reading
// first: how a bulk loader would fill the baseline before it is timed on
// later events. The records equal those Event would leave.
func (n *Naive) LoadNew(ev []Payment) error {
	b := n.db.NewBatch()
	for i, e := range ev {
		a, d := acctAggs(), devAggs()
		applyPayment(a, d, e, &n.out)
		for _, kv := range []struct {
			key  string
			aggs []tallyward.Aggregate
		}{{"a" + e.Account, a}, {"d" + e.Device, d}} {
			if err := n.encode(kv.aggs); err != nil {
				b.Close()
				return err
			}
			if err := b.Set([]byte(kv.key), n.buf, nil); err != nil {
				b.Close()
				return err
			}
		}
		if i%10_000 == 9_999 || i == len(ev)-1 {
			if err := b.Commit(pebble.NoSync); err != nil {
				b.Close()
				return err
			}
			b.Close()
			b = n.db.NewBatch()
		}
	}
	return b.Close()
}
