package main

import "flag"

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
				return changeState(e, *spec, *state, args, 1, "snapshot takes DEST", func(p *eventPipeline) (string, error) {
					return "snapshot written to " + args[0], p.Snapshot(args[0])
				})
			}
		},
	})
}
