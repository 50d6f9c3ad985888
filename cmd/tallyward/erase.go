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
				if len(args) != 2 {
					e.errorf("erase takes ENTITY KEY (got %d arguments)", len(args))
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
				err := p.Erase(args[0], args[1])
				if cerr := p.Close(); err == nil {
					err = cerr
				}
				if err != nil {
					e.errorf("%v", err)
					return exitFailure
				}
				fmt.Fprintf(e.stdout, "erased %s %q\n", args[0], args[1])
				return exitOK
			}
		},
	})
}
