// Command marketplace is a demo on invented data: three weeks of traffic
// on a made-up second-hand marketplace (accounts, devices, network
// addresses, payment cards) with four injected attacks: credential
// stuffing, card testing, account takeover and a spam burst. It writes the
// events as a JSON-lines file, computes the features of marketplace.yaml
// over them exactly as `tallyward replay` does, and prints, for each
// attack, how well a simple threshold on each feature separates the
// attack's events from normal traffic.
//
//	go run ./examples/marketplace            # files in a temporary directory
//	go run ./examples/marketplace -dir /tmp/market
//	tallyward replay -spec examples/marketplace/marketplace.yaml \
//	    -state /tmp/market/state -out /tmp/market/features.parquet /tmp/market/events.jsonl.gz
//
// Caution: features are signals for a reviewer or a model, not verdicts.
// The thresholds here are fitted to this invented data and say nothing
// about real traffic; validate any threshold on your own labelled data,
// and mind that decisions about people need review and a way to appeal.
package main

import (
	"cmp"
	"compress/gzip"
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"log"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"runtime"
	"slices"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/source"
	"github.com/tallyward/tallyward/specfile"
)

// event is one line of events.jsonl.gz.
type event struct {
	At      time.Time `json:"at"`
	Kind    string    `json:"kind"`
	Account string    `json:"account"`
	Device  string    `json:"device"`
	Addr    string    `json:"addr"`
	Card    string    `json:"card,omitempty"`
	Amount  float64   `json:"amount,omitempty"`
	Label   string    `json:"label"`
}

const (
	normal       = "normal"
	credStuffing = "credential_stuffing"
	cardTesting  = "card_testing"
	takeover     = "account_takeover"
	spamBurst    = "spam_burst"
)

func main() {
	dir := flag.String("dir", "", "directory for the generated files (default: a temporary one)")
	seed := flag.Uint64("seed", 1, "random seed")
	accounts := flag.Int("accounts", 3000, "ordinary accounts")
	flag.Parse()
	if *dir == "" {
		d, err := os.MkdirTemp("", "marketplace-")
		if err != nil {
			log.Fatal(err)
		}
		defer os.RemoveAll(d)
		*dir = d
	} else if err := os.MkdirAll(*dir, 0o755); err != nil {
		log.Fatal(err)
	}
	evs := generate(rand.New(rand.NewPCG(*seed, 99)), *accounts)
	path := filepath.Join(*dir, "events.jsonl.gz")
	if err := writeEvents(path, evs); err != nil {
		log.Fatal(err)
	}
	fmt.Printf("wrote %d events (%s .. %s) to %s\n", len(evs), evs[0].At.Format(time.DateOnly), evs[len(evs)-1].At.Format(time.DateOnly), path)
	rows, names, err := features(path)
	if err != nil {
		log.Fatal(err)
	}
	report(rows, names)
}

// generate draws three weeks of ordinary traffic and the four attacks.
func generate(rng *rand.Rand, nAccounts int) []event {
	start := time.Date(2026, 2, 2, 0, 0, 0, 0, time.UTC)
	days := 21
	var evs []event
	type acct struct {
		id, addr string
		devices  []string
		cards    []string
	}
	accts := make([]acct, nAccounts)
	for i := range accts {
		a := acct{id: fmt.Sprintf("acct-%05d", i), addr: fmt.Sprintf("10.%d.%d.%d", rng.IntN(200), rng.IntN(250), 1+rng.IntN(250))}
		for range 1 + rng.IntN(2) {
			a.devices = append(a.devices, fmt.Sprintf("dev-%06x", rng.Uint32()&0xffffff))
		}
		for range 1 + rng.IntN(2) {
			a.cards = append(a.cards, fmt.Sprintf("card-%06x", rng.Uint32()&0xffffff))
		}
		accts[i] = a
	}
	at := func(day int, hour float64) time.Time {
		return start.Add(time.Duration(day)*24*time.Hour + time.Duration(hour*float64(time.Hour)))
	}
	// Ordinary traffic: a session or two on some days, each a login
	// (rarely mistyped first), then some payments and messages.
	for _, a := range accts {
		for d := 0; d < days; d++ {
			if rng.Float64() > 0.35 {
				continue
			}
			t := at(d, 7+rng.Float64()*15)
			dev := a.devices[rng.IntN(len(a.devices))]
			addr := a.addr
			if rng.IntN(10) == 0 {
				addr = fmt.Sprintf("172.16.%d.%d", rng.IntN(250), rng.IntN(250)) // on the move
			}
			if rng.IntN(12) == 0 {
				evs = append(evs, event{At: t, Kind: "login_fail", Account: a.id, Device: dev, Addr: addr, Label: normal})
				t = t.Add(time.Duration(10+rng.IntN(50)) * time.Second)
			}
			evs = append(evs, event{At: t, Kind: "login_ok", Account: a.id, Device: dev, Addr: addr, Label: normal})
			for range rng.IntN(3) {
				t = t.Add(time.Duration(1+rng.IntN(20)) * time.Minute)
				kind := "payment"
				if rng.IntN(25) == 0 {
					kind = "payment_declined"
				}
				evs = append(evs, event{At: t, Kind: kind, Account: a.id, Device: dev, Addr: addr,
					Card: a.cards[rng.IntN(len(a.cards))], Amount: math.Round(rng.ExpFloat64()*3500) / 100, Label: normal})
			}
			for range rng.IntN(4) {
				t = t.Add(time.Duration(1+rng.IntN(15)) * time.Minute)
				evs = append(evs, event{At: t, Kind: "message", Account: a.id, Device: dev, Addr: addr, Label: normal})
			}
		}
	}
	// Credential stuffing, day 6: 15 addresses try leaked credentials
	// against 1200 accounts over two hours; a few succeed.
	for i := range 1200 {
		a := accts[rng.IntN(len(accts))]
		t := at(6, 2+2*float64(i)/1200)
		addr := fmt.Sprintf("203.0.113.%d", 10+rng.IntN(15))
		kind := "login_fail"
		if rng.IntN(40) == 0 {
			kind = "login_ok"
		}
		evs = append(evs, event{At: t, Kind: kind, Account: a.id, Device: fmt.Sprintf("bot-%02d", rng.IntN(6)), Addr: addr, Label: credStuffing})
	}
	// Card testing, day 10: three fresh accounts on one device each try
	// 60 stolen cards with small amounts; most are declined.
	for k := range 3 {
		acc, dev := fmt.Sprintf("acct-ct-%d", k), fmt.Sprintf("dev-ct-%d", k)
		addr := fmt.Sprintf("198.51.100.%d", 7+k)
		t := at(10, 3+float64(k))
		evs = append(evs, event{At: t, Kind: "login_ok", Account: acc, Device: dev, Addr: addr, Label: cardTesting})
		for range 60 {
			t = t.Add(time.Duration(20+rng.IntN(40)) * time.Second)
			kind := "payment_declined"
			if rng.IntN(8) == 0 {
				kind = "payment"
			}
			evs = append(evs, event{At: t, Kind: kind, Account: acc, Device: dev, Addr: addr,
				Card: fmt.Sprintf("card-x%05d", rng.IntN(100000)), Amount: 1 + float64(rng.IntN(200))/100, Label: cardTesting})
		}
	}
	// Account takeover, days 14-16: 25 established accounts are entered
	// from a new device and address, then drained with large payments to
	// the taker's cards.
	for i := range 25 {
		a := accts[rng.IntN(len(accts))]
		t := at(14+i%3, rng.Float64()*24)
		dev, addr := fmt.Sprintf("dev-ato-%02d", i%5), fmt.Sprintf("192.0.2.%d", 40+i%9)
		evs = append(evs, event{At: t, Kind: "login_ok", Account: a.id, Device: dev, Addr: addr, Label: takeover})
		for range 2 + rng.IntN(3) {
			t = t.Add(time.Duration(1+rng.IntN(5)) * time.Minute)
			evs = append(evs, event{At: t, Kind: "payment", Account: a.id, Device: dev, Addr: addr,
				Card: fmt.Sprintf("card-ato-%d", i%4), Amount: 300 + math.Round(rng.Float64()*60000)/100, Label: takeover})
		}
	}
	// Spam burst, day 18: 40 new accounts post 30 messages each within
	// twenty minutes.
	for k := range 40 {
		acc, dev := fmt.Sprintf("acct-sp-%02d", k), fmt.Sprintf("dev-sp-%02d", k%8)
		addr := fmt.Sprintf("100.64.%d.%d", k%4, 20+k)
		t := at(18, 12+rng.Float64())
		evs = append(evs, event{At: t, Kind: "login_ok", Account: acc, Device: dev, Addr: addr, Label: spamBurst})
		for range 30 {
			t = t.Add(time.Duration(5+rng.IntN(70)) * time.Second)
			evs = append(evs, event{At: t, Kind: "message", Account: acc, Device: dev, Addr: addr, Label: spamBurst})
		}
	}
	slices.SortStableFunc(evs, func(a, b event) int { return a.At.Compare(b.At) })
	return evs
}

func writeEvents(path string, evs []event) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	z := gzip.NewWriter(f)
	enc := json.NewEncoder(z)
	for _, e := range evs {
		if err := enc.Encode(e); err != nil {
			return err
		}
	}
	if err := z.Close(); err != nil {
		return err
	}
	return f.Close()
}

// row is one event's features with its kind and label.
type row struct {
	kind, label string
	vals        []float64
}

// features runs the spec file over the events file, as the replay
// command does (the command also keeps state on disk and writes a table).
func features(path string) ([]row, []string, error) {
	_, self, _, _ := runtime.Caller(0)
	f, err := specfile.Load(filepath.Join(filepath.Dir(self), "marketplace.yaml"))
	if err != nil {
		return nil, nil, err
	}
	kindF, _ := f.Schema.Index("kind")
	labelF, _ := f.Schema.Index("label")
	var rows []row
	spec := f.Spec
	spec.Emit = func(r tallyward.Row[specfile.Event]) {
		rows = append(rows, row{r.Event.Fields[kindF].Str, r.Event.Fields[labelF].Str, slices.Clone(r.Values)})
	}
	p, err := tallyward.Open(spec, f.Options)
	if err != nil {
		return nil, nil, err
	}
	defer p.Close()
	rd, err := source.Open([]string{path}, f.Schema, source.Options{MaxDisorder: f.Options.MaxDisorder}, nil, 0)
	if err != nil {
		return nil, nil, err
	}
	defer rd.Close()
	if err := p.Replay(context.Background(), rd.Events()); err != nil {
		return nil, nil, err
	}
	return rows, p.Names(), nil
}

// report prints, per attack, the features whose best single threshold
// (value >= t) separates the attack's events from normal events of the
// same kinds best (largest detection rate minus false-positive rate).
func report(rows []row, names []string) {
	attacks := []struct {
		label string
		kinds []string
	}{
		{credStuffing, []string{"login_ok", "login_fail"}},
		{cardTesting, []string{"payment", "payment_declined"}},
		{takeover, []string{"payment"}},
		{spamBurst, []string{"message"}},
	}
	fmt.Println("\nPer attack, the three features a single threshold separates best")
	fmt.Println("(detection = share of the attack's events at or above the threshold;")
	fmt.Println(" false positives = share of normal events of the same kinds above it):")
	for _, at := range attacks {
		var att, norm []row
		for _, r := range rows {
			if !slices.Contains(at.kinds, r.kind) {
				continue
			}
			switch r.label {
			case at.label:
				att = append(att, r)
			case normal:
				norm = append(norm, r)
			}
		}
		type score struct {
			name          string
			thr, det, fpr float64
		}
		var scores []score
		for j, n := range names {
			thr, det, fpr := bestThreshold(att, norm, j)
			scores = append(scores, score{n, thr, det, fpr})
		}
		slices.SortStableFunc(scores, func(a, b score) int { return cmp.Compare(b.det-b.fpr, a.det-a.fpr) })
		fmt.Printf("\n%s (%d attack events, %d normal %v events)\n", at.label, len(att), len(norm), at.kinds)
		for _, s := range scores[:3] {
			fmt.Printf("  %-22s >= %-9.4g detects %5.1f%%  false positives %6.3f%%\n", s.name, s.thr, 100*s.det, 100*s.fpr)
		}
	}
	fmt.Println("\nThese thresholds are fitted to invented data. Features are signals for a")
	fmt.Println("reviewer or a model, not verdicts: validate any threshold on your own")
	fmt.Println("labelled data before it affects anyone.")
}

// bestThreshold tries each attack value of feature j as a threshold and
// keeps the one with the largest detection minus false-positive rate.
// NaN (no such entity, no value yet) never passes a threshold.
func bestThreshold(att, norm []row, j int) (thr, det, fpr float64) {
	normVals := make([]float64, 0, len(norm))
	for _, r := range norm {
		if v := r.vals[j]; !math.IsNaN(v) {
			normVals = append(normVals, v)
		}
	}
	slices.Sort(normVals)
	attVals := make([]float64, 0, len(att))
	for _, r := range att {
		if v := r.vals[j]; !math.IsNaN(v) {
			attVals = append(attVals, v)
		}
	}
	slices.Sort(attVals)
	best := math.Inf(-1)
	for i, t := range attVals {
		if i > 0 && attVals[i-1] == t {
			continue
		}
		d := float64(len(attVals)-i) / float64(max(1, len(att)))
		k, _ := slices.BinarySearch(normVals, t)
		f := float64(len(normVals)-k) / float64(max(1, len(norm)))
		if d-f > best {
			best, thr, det, fpr = d-f, t, d, f
		}
	}
	return thr, det, fpr
}
