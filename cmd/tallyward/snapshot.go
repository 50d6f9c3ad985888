package main

import (
	"flag"
	"fmt"
)

func init() {
	register(&command{
		name:    "snapshot",
		summary: "write a consistent copy of a state directory",
		help: `
usage: tallyward snapshot -spec FILE -state DIR DEST

Commits and writes a consistent copy of the state (records, definitions,
source position, watermark) to DEST, which must not exist. A replay run
with -state DEST continues exactly where the original was. Do not run it
while a replay uses the same state directory.

Example:
  tallyward snapshot -spec market.yaml -state ./state ./state-2026-03-01`,
		flags: func(fs *flag.FlagSet) func(*env, []string) int {
			spec, state := specFlag(fs), stateFlag(fs)
			return func(e *env, args []string) int {
				if len(args) != 1 {
					e.errorf("snapshot takes DEST (got %d arguments)", len(args))
					return exitUsage
				}
				f, code, ok := loadSpec(e, *spec)
				if !ok {
					return code
				}
				p, code, ok := openExisting(e, f, *state, f.Options)
				if !ok {
					return code
				}
				err := p.Snapshot(args[0])
				if cerr := p.Close(); err == nil {
					err = cerr
				}
				if err != nil {
					e.errorf("%v", err)
					return exitFailure
				}
				fmt.Fprintf(e.stdout, "snapshot written to %s\n", args[0])
				return exitOK
			}
		},
	})
}
