package scaleout_test

import (
	"fmt"

	"github.com/tallyward/tallyward/scaleout"
)

// Two stages each emit a partial row per event (account features, then
// device features); a Meeting hands over each event once both have come,
// in part order, whatever order they arrive in.
func ExampleMeeting() {
	m := scaleout.Meeting{Parts: 2, Emit: func(id string, at int64, parts [][]float64) {
		fmt.Println(id, parts)
	}}
	m.Add("pay-1", 100, 1, []float64{3})    // device stage first
	m.Add("pay-2", 101, 0, []float64{1, 9}) // account stage
	m.Add("pay-1", 100, 0, []float64{2, 40})
	m.Add("pay-1", 100, 1, []float64{3}) // a repeat: dropped
	m.Expire(102)                        // events before 102 will get no more parts: pay-2 is dropped
	fmt.Printf("%+v\n", m.Stats())
	// Output:
	// pay-1 [[2 40] [3]]
	// {Complete:1 Repeated:1 Expired:1 Held:0}
}
