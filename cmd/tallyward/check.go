package main

import (
	"errors"
	"flag"
	"fmt"
	"strings"

	"github.com/tallyward/tallyward"
)

func init() {
	register(&command{
		name:    "check",
		summary: "validate a spec file; show stored definitions and what a change would reset",
		help: `
usage: tallyward check -spec FILE [-state DIR]

Validates the spec file, printing every problem with its line, and lists
each feature's canonical definition (every parameter spelled out,
defaults included). With -state, compares them with the definitions stored
in the state directory (read from a temporary copy; the directory is not
changed) and lists each feature a replay would refuse to run without
-reset, and so would discard and need to backfill. Exit code 5 when there
are such differences.

Example:
  tallyward check -spec market.yaml -state ./state`,
		flags: func(fs *flag.FlagSet) func(*env, []string) int {
			spec := specFlag(fs)
			state := fs.String("state", "", "state directory to compare with (optional)")
			return func(e *env, args []string) int {
				if len(args) != 0 {
					e.errorf("check takes no arguments")
					return exitUsage
				}
				f, code, ok := loadSpec(e, *spec)
				if !ok {
					return code
				}
				// Open validates what the spec file cannot see alone
				// (horizon-dependent limits), on an in-memory store.
				p, err := tallyward.Open(withEmit(f.Spec), f.Options)
				if err != nil {
					e.errorf("invalid spec file:\n%v", err)
					return exitBadSpec
				}
				p.Close()
				fmt.Fprintf(e.stdout, "%s: valid\n", f.Name)
				for _, ent := range f.Spec.Entities {
					for _, ft := range ent.Features {
						fmt.Fprintf(e.stdout, "  %s.%s\t%s\n", ent.Name, ft.Name, ft.Kind.Describe())
					}
				}
				if *state == "" {
					return exitOK
				}
				return withCopy(e, *state, func(dir string) int {
					opts := f.Options
					opts.Dir = dir
					p, err := tallyward.Open(withEmit(f.Spec), opts)
					if err == nil {
						p.Close()
						fmt.Fprintf(e.stdout, "stored definitions in %s match\n", *state)
						return exitOK
					}
					if !errors.Is(err, tallyward.ErrDefinitionChanged) {
						e.errorf("%v", err)
						return exitFailure
					}
					fmt.Fprintf(e.stdout, "stored definitions in %s differ; a replay needs -reset for each of these (their state is discarded and must be backfilled):\n", *state)
					for _, line := range strings.Split(err.Error(), "\n") {
						fmt.Fprintf(e.stdout, "  %s\n", strings.TrimPrefix(line, tallyward.ErrDefinitionChanged.Error()+": "))
					}
					return exitDefinitions
				})
			}
		},
	})
}
