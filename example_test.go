package tallyward_test

import (
	"fmt"
	"time"

	"github.com/tallyward/tallyward"
)

type Attempt struct {
	At      int64 // event time, Unix nanoseconds
	Account string
	Addr    string
	OK      bool
}

func Example() {
	failed := func(a Attempt) bool { return !a.OK }
	p, err := tallyward.Open(tallyward.Spec[Attempt]{
		Time: func(a Attempt) int64 { return a.At },
		Entities: []tallyward.Entity[Attempt]{
			{Name: "addr", Key: func(a Attempt) string { return a.Addr }, Features: []tallyward.Feature[Attempt]{
				{Name: "failed_10m", Kind: tallyward.SlidingCount{Window: 10 * time.Minute, Resolution: 10 * time.Second}, Where: failed},
				{Name: "accounts_1h", Kind: tallyward.Distinct{Window: time.Hour}, Item: func(a Attempt) string { return a.Account }},
			}},
			{Name: "account", Key: func(a Attempt) string { return a.Account }, Features: []tallyward.Feature[Attempt]{
				{Name: "since_last_s", Kind: tallyward.Recency{}},
			}},
		},
	}, tallyward.Options{MaxDisorder: 2 * time.Second}) // in memory: no Dir
	if err != nil {
		panic(err)
	}
	defer p.Close()

	start := time.Date(2026, 5, 1, 12, 0, 0, 0, time.UTC).UnixNano()
	attempts := []Attempt{
		{At: start, Account: "ana", Addr: "192.0.2.1", OK: false},
		{At: start + int64(20*time.Second), Account: "ben", Addr: "192.0.2.1", OK: false},
		{At: start + int64(45*time.Second), Account: "ana", Addr: "192.0.2.1", OK: true},
	}
	fmt.Println(p.Names())
	var vals []float64
	for _, a := range attempts {
		vals, err = p.Score(a, vals[:0])
		if err != nil {
			panic(err)
		}
		fmt.Println(vals)
	}
	// Output:
	// [addr.failed_10m addr.accounts_1h account.since_last_s]
	// [1 1 NaN]
	// [2 2 NaN]
	// [2 2 45]
}
