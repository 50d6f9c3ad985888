package main

import (
	"fmt"
	"math"
	"os"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/source"
	"github.com/tallyward/tallyward/specfile"
	"golang.org/x/term"
)

// progress prints one self-overwriting status line on stderr: events
// done, events/s, watermark and ETA (from bytes read of the inputs). The
// wall clock here is for display only.
type progress struct {
	e       *env
	on      bool
	p       *tallyward.Pipeline[specfile.Event]
	rd      *source.Reader
	start   time.Time
	last    time.Time
	events  uint64
	base    uint64
	printed bool
}

func newProgress(e *env, mode string, p *tallyward.Pipeline[specfile.Event], rd *source.Reader) *progress {
	on := mode == "always"
	if mode == "auto" {
		w := e.stderr
		if l, ok := w.(*lockedWriter); ok {
			w = l.w
		}
		if f, ok := w.(*os.File); ok {
			on = term.IsTerminal(int(f.Fd()))
		}
	}
	now := time.Now()
	return &progress{e: e, on: on, p: p, rd: rd, start: now, last: now}
}

// wrap counts the events of src and calls tick now and then.
func (pr *progress) wrap(src tallyward.Source[specfile.Event], base uint64) tallyward.Source[specfile.Event] {
	pr.base = base
	return func(yield func(specfile.Event, error) bool) {
		for ev, err := range src {
			if err == nil {
				killPoint("event", pr.base+pr.events)
				pr.events++
				if pr.on && pr.events&8191 == 0 {
					pr.tick()
				}
			}
			if !yield(ev, err) {
				return
			}
		}
	}
}

func (pr *progress) tick() {
	now := time.Now()
	if now.Sub(pr.last) < 250*time.Millisecond {
		return
	}
	pr.last = now
	el := now.Sub(pr.start).Seconds()
	rate := float64(pr.events) / el
	read, total := pr.rd.Progress()
	eta := "?"
	if read > 0 && total > read {
		eta = time.Duration(el * float64(total-read) / float64(read) * float64(time.Second)).Round(time.Second).String()
	} else if total > 0 && read >= total {
		eta = "0s"
	}
	wm := "-"
	if w := pr.p.Watermark(); w != math.MinInt64 && w != math.MaxInt64 {
		wm = specfile.FormatTime(w)
	}
	fmt.Fprintf(pr.e.stderr, "\r%12d events  %9.0f ev/s  watermark %-30s  %5.1f%%  ETA %-8s", pr.base+pr.events, rate, wm, 100*float64(read)/math.Max(1, float64(total)), eta)
	pr.printed = true
}

func (pr *progress) done() {
	if pr.printed {
		fmt.Fprintln(pr.e.stderr)
	}
}
