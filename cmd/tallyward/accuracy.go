package main

import (
	"errors"
	"flag"
	"time"

	"github.com/tallyward/tallyward/bench/report"
)

func init() {
	register(&command{
		name:    "accuracy",
		summary: "measure sketch error against exact counts (and speed), write a report with plots",
		help: `
usage: tallyward accuracy [-quick] [-speed] [-input FILE] [-out DIR]

Streams seeded data through every summary (distinct counts at several
precisions beside github.com/axiomhq/hyperloglog, the windowed distinct,
Count-Min, Space-Saving, quantiles, sliding counts at coarse resolutions)
and through an exact reference, and writes DIR/report.md with tables and
PNG plots. Each table names the published bound it is compared with.
With -input, the report is on your own rows instead: a CSV file of
key,item[,value[,time]] (a header line starting with "key" is skipped;
time is RFC 3339 or Unix nanoseconds), so you can see the error on your
traffic before trusting a sketch. With -speed, the speed of a six-feature
pipeline against a naive per-event Pebble store and an exact in-memory
map is measured too, at 100k, 1M and 10M live entities (about 15 minutes
on 2 cores; see bench/README.md); a line on stderr as each pass ends. The
same seed gives the same accuracy page.

Exit code 1 when any error figure is outside its bound.

Example:
  tallyward accuracy -quick -out ./accuracy
  tallyward accuracy -input payments.csv -out ./my-accuracy`,
		flags: func(fs *flag.FlagSet) func(*env, []string) int {
			o := report.Flags(fs)
			return func(e *env, args []string) int {
				if len(args) != 0 {
					e.errorf("accuracy takes no arguments (got %d)", len(args))
					return exitUsage
				}
				start := time.Now()
				if o.Speed {
					o.Progress = e.stderr
				}
				r, err := report.Generate(*o)
				if err != nil {
					e.errorf("%v", err)
					if errors.Is(err, report.ErrBadRow) {
						return exitBadInput
					}
					return exitFailure
				}
				if err := r.Write(o.Out); err != nil {
					e.errorf("%v", err)
					return exitFailure
				}
				if report.Summarize(r, o.Out, time.Since(start), e.stdout) != 0 {
					return exitFailure
				}
				return exitOK
			}
		},
	})
}
