// Command signin is a small demo on invented data: sign-in attempts to a
// made-up web service, with a credential-stuffing burst hidden among
// ordinary traffic. It replays the first five hours of history through a
// pipeline kept in Pebble in a temporary directory, switches the same
// pipeline to a live driver for the last hour (no gap, no double count),
// prints the addresses whose features stand out, then reopens the store to
// show that state survived.
//
//	go run ./examples/signin
//
// The features are signals for a model or a human reviewer, not verdicts:
// the threshold below is for the demo only and says nothing about real
// traffic.
package main

import (
	"cmp"
	"context"
	"flag"
	"fmt"
	"log"
	"math"
	"math/rand/v2"
	"os"
	"runtime"
	"slices"
	"sync/atomic"
	"time"

	"github.com/tallyward/tallyward"
)

// attempt is one sign-in attempt.
type attempt struct {
	At      int64 // Unix ns
	Account string
	Addr    string
	OK      bool
}

func main() {
	n := flag.Int("events", 200_000, "number of sign-in attempts to generate")
	seed := flag.Uint64("seed", 1, "random seed")
	flag.Parse()
	if err := run(*n, *seed); err != nil {
		log.Fatal(err)
	}
}

func spec(emit func(tallyward.Row[attempt])) tallyward.Spec[attempt] {
	failed := func(a attempt) bool { return !a.OK }
	return tallyward.Spec[attempt]{
		Time: func(a attempt) int64 { return a.At },
		Emit: emit,
		Entities: []tallyward.Entity[attempt]{
			{Name: "addr", Key: func(a attempt) string { return a.Addr }, Features: []tallyward.Feature[attempt]{
				{Name: "failed_10m", Kind: tallyward.SlidingCount{Window: 10 * time.Minute, Resolution: 10 * time.Second}, Where: failed},
				{Name: "attempts_1h", Kind: tallyward.SlidingCount{Window: time.Hour, Resolution: time.Minute}},
				{Name: "accounts_1h", Kind: tallyward.Distinct{Window: time.Hour, Resolution: time.Minute}, Item: func(a attempt) string { return a.Account }},
				{Name: "fail_burst", Kind: tallyward.Velocity{Short: 5 * time.Minute, Long: time.Hour, Resolution: time.Minute}, Where: failed},
			}},
			{Name: "account", Key: func(a attempt) string { return a.Account }, Features: []tallyward.Feature[attempt]{
				{Name: "failed_1h", Kind: tallyward.SlidingCount{Window: time.Hour, Resolution: time.Minute}, Where: failed},
				{Name: "failed_decayed", Kind: tallyward.Decayed{HalfLife: 30 * time.Minute}, Where: failed},
				{Name: "since_last_s", Kind: tallyward.Recency{}},
			}},
		},
	}
}

func run(n int, seed uint64) error {
	dir, err := os.MkdirTemp("", "tallyward-demo-")
	if err != nil {
		return err
	}
	defer os.RemoveAll(dir)
	events := generate(n, seed)

	// Keep, per address, the row at which its failed_10m peaked.
	type peak struct {
		addr string
		at   int64
		vals []float64
	}
	peaks := map[string]peak{}
	emit := func(r tallyward.Row[attempt]) {
		if r.Values[0] == 0 {
			return // no failed sign-in in its last 10 minutes: not a peak worth keeping
		}
		if p, ok := peaks[r.Event.Addr]; !ok || r.Values[0] > p.vals[0] {
			peaks[r.Event.Addr] = peak{r.Event.Addr, r.Time, slices.Clone(r.Values)}
		}
	}
	// One worker per core: rows and state are the same with any number.
	opts := tallyward.Options{Dir: dir, Mode: tallyward.Settled, MaxDisorder: 2 * time.Second, Workers: runtime.GOMAXPROCS(0)}
	p, err := tallyward.Open(spec(emit), opts)
	if err != nil {
		return err
	}
	// History: the first five hours through the replay driver, without
	// flushing, so the same pipeline can go on live.
	switchAt := begin + int64(5*time.Hour)
	split, _ := slices.BinarySearchFunc(events, switchAt, func(a attempt, t int64) int { return cmp.Compare(a.At, t) })
	start := time.Now()
	if err := p.Feed(context.Background(), source(events[:split])); err != nil {
		return err
	}
	replayed := time.Since(start)

	// Live: the last hour arrives on a channel from four goroutines' worth
	// of traffic; the clock follows the events so nothing is "future".
	clock := &followClock{}
	live := tallyward.NewLive(p, clock)
	ch := make(chan attempt, 1024)
	go func() {
		for _, e := range events[split:] {
			clock.set(e.At)
			ch <- e
		}
		close(ch)
	}()
	start = time.Now()
	if err := live.Run(context.Background(), ch, 0); err != nil {
		return err
	}
	if err := live.Flush(context.Background()); err != nil {
		return err
	}
	lived := time.Since(start)
	st := live.Stats()
	if err := live.Close(); err != nil {
		return err
	}

	fmt.Printf("replayed %d sign-in attempts in %v, then %d live in %v; store in %s\n",
		split, replayed.Round(time.Millisecond), len(events)-split, lived.Round(time.Millisecond), dir)
	var rejected uint64
	for _, n := range st.Rejected {
		rejected += n
	}
	fmt.Printf("applied %d, emitted %d rows, late %d, rejected %d, %d entities stored\n\n",
		st.Applied, st.Emitted, st.Late, rejected, st.LiveEntities)

	all := make([]peak, 0, len(peaks))
	for _, p := range peaks {
		all = append(all, p)
	}
	slices.SortFunc(all, func(a, b peak) int {
		if c := cmp.Compare(b.vals[0], a.vals[0]); c != 0 {
			return c
		}
		return cmp.Compare(a.addr, b.addr)
	})
	fmt.Println("addresses with the most failed sign-ins in any 10 minutes, at that moment (demo threshold: 50)")
	fmt.Printf("%-14s %-20s %10s %11s %11s %10s\n", "address", "at (UTC)", "failed_10m", "attempts_1h", "accounts_1h", "fail_burst")
	for _, p := range all[:min(8, len(all))] {
		mark := ""
		if p.vals[0] >= 50 {
			mark = "  <- for review"
		}
		fmt.Printf("%-14s %-20s %10.0f %11.0f %11.0f %10.1f%s\n", p.addr, time.Unix(0, p.at).UTC().Format("2006-01-02 15:04:05"),
			p.vals[0], p.vals[1], p.vals[2], p.vals[3], mark)
	}

	// Reopen: definitions are checked and state is where the commit left it.
	p, err = tallyward.Open(spec(func(tallyward.Row[attempt]) {}), opts)
	if err != nil {
		return err
	}
	defer p.Close()
	wm := "+inf (the replay was flushed at its end)"
	if p.Watermark() != math.MaxInt64 {
		wm = time.Unix(0, p.Watermark()).UTC().String()
	}
	fmt.Printf("\nreopened: resume at event %d, watermark %s, %d events counted before\n", p.ResumeSeq(), wm, p.Stats().Events)
	return nil
}

// followClock is the live driver's clock in this demo: it reads the time
// of the newest event handed to the channel, as if the traffic were real.
type followClock struct{ now atomic.Int64 }

func (c *followClock) set(t int64) { c.now.Store(t) }
func (c *followClock) Now() int64  { return c.now.Load() }

func source(evs []attempt) tallyward.Source[attempt] {
	return func(yield func(attempt, error) bool) {
		for _, e := range evs {
			if !yield(e, nil) {
				return
			}
		}
	}
}

var begin = time.Date(2026, 3, 14, 8, 0, 0, 0, time.UTC).UnixNano()

// generate makes n attempts over six hours: ordinary users who mostly
// succeed from their own few addresses, and, in hour four, three addresses
// (documentation ranges) cycling through many accounts with mostly wrong
// passwords. The attempts are drawn first and named in time order, so
// their strings lie in memory in the order a replay reads them, as a
// decoded log's would.
func generate(n int, seed uint64) []attempt {
	type draw struct {
		at         int64
		user, home int // home < 0: attacker -1-home
		ok         bool
	}
	r := rand.New(rand.NewPCG(seed, 7))
	span := int64(6 * time.Hour)
	draws := make([]draw, 0, n)
	for range n * 95 / 100 {
		u := r.IntN(20_000)
		home := u*3 + r.IntN(3) // three addresses per user
		draws = append(draws, draw{at: begin + r.Int64N(span), user: u, home: home, ok: r.IntN(20) != 0})
	}
	attackers := []string{"203.0.113.7", "203.0.113.8", "203.0.113.9"}
	burst := begin + int64(3*time.Hour)
	for len(draws) < n {
		draws = append(draws, draw{at: burst + r.Int64N(int64(40*time.Minute)), user: r.IntN(20_000), home: -1 - r.IntN(len(attackers)), ok: r.IntN(200) == 0})
	}
	slices.SortFunc(draws, func(a, b draw) int { return cmp.Compare(a.at, b.at) })
	evs := make([]attempt, len(draws))
	for i, d := range draws {
		addr := ""
		if d.home < 0 {
			addr = attackers[-1-d.home]
		} else {
			addr = fmt.Sprintf("198.51.%d.%d", d.home/250%250, d.home%250+1)
		}
		evs[i] = attempt{At: d.at, Account: fmt.Sprintf("user%05d", d.user), Addr: addr, OK: d.ok}
	}
	return evs
}
