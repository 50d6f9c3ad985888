package main

import (
	"flag"
	"fmt"
)

func init() {
	register(&command{
		name:    "erase",
		summary: "delete every stored trace of one entity key, durably",
		help: `
usage: tallyward erase -spec FILE -state DIR ENTITY KEY

Removes the key's record with every feature state and its index entries,
and leaves a tombstone holding only a salted hash of the key, so a later
replay of history does not rebuild it. The erasure is committed (synced)
before the command returns. For privacy and legal requests; local law on
such requests applies to the state kept.

Example:
  tallyward erase -spec market.yaml -state ./state account acct-00042`,
		flags: func(fs *flag.FlagSet) func(*env, []string) int {
			spec, state := specFlag(fs), stateFlag(fs)
			return func(e *env, args []string) int {
				return changeState(e, *spec, *state, args, 2, "erase takes ENTITY KEY", func(p *eventPipeline) (string, error) {
					return fmt.Sprintf("erased %s %q", args[0], args[1]), p.Erase(args[0], args[1])
				})
			}
		},
	})
}
