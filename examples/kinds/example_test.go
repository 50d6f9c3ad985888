package kinds_test

import (
	"fmt"
	"log"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/examples/kinds"
)

// signIn is one sign-in attempt to an invented web service.
type signIn struct {
	At      time.Time
	Account string
	OK      bool
}

// A FailStreak feature next to a built-in one: failed sign-ins since the
// account's last successful one, scored inline as each attempt arrives.
func ExampleFailStreak() {
	failed := func(s signIn) float64 {
		if s.OK {
			return 0
		}
		return 1
	}
	spec := tallyward.Spec[signIn]{
		Time: func(s signIn) int64 { return s.At.UnixNano() },
		Entities: []tallyward.Entity[signIn]{{
			Name: "account",
			Key:  func(s signIn) string { return s.Account },
			Features: []tallyward.Feature[signIn]{
				{Name: "fails_since_ok", Kind: kinds.FailStreak{}, Value: failed},
				{Name: "attempts_10m", Kind: tallyward.SlidingCount{Window: 10 * time.Minute}},
			},
		}},
	}
	p, err := tallyward.Open(spec, tallyward.Options{MaxDisorder: 5 * time.Second})
	if err != nil {
		log.Fatal(err)
	}
	defer p.Close()

	t0 := time.Date(2031, 4, 2, 9, 0, 0, 0, time.UTC)
	for i, ok := range []bool{true, false, false, false, true, false} {
		s := signIn{At: t0.Add(time.Duration(i) * 30 * time.Second), Account: "acct-417", OK: ok}
		row, err := p.Score(s, nil)
		if err != nil {
			log.Fatal(err)
		}
		fmt.Printf("%s ok=%-5v fails_since_ok=%v attempts_10m=%v\n", s.At.Format("15:04:05"), ok, row[0], row[1])
	}
	// Output:
	// 09:00:00 ok=true  fails_since_ok=0 attempts_10m=1
	// 09:00:30 ok=false fails_since_ok=1 attempts_10m=2
	// 09:01:00 ok=false fails_since_ok=2 attempts_10m=3
	// 09:01:30 ok=false fails_since_ok=3 attempts_10m=4
	// 09:02:00 ok=true  fails_since_ok=0 attempts_10m=5
	// 09:02:30 ok=false fails_since_ok=1 attempts_10m=6
}
