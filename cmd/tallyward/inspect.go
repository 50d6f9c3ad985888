package main

import (
	"errors"
	"flag"
	"fmt"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/specfile"
)

func init() {
	register(&command{
		name:    "inspect",
		summary: "show the stored state of one entity key as of a time",
		help: `
usage: tallyward inspect -spec FILE -state DIR [-at TIME] ENTITY KEY

Prints every feature of one entity key as of a time, decoded from the
stored state: what a row for an event of that key at that time would
read, without the event itself being counted. It works on a temporary
copy of the state directory, which is not changed. Answers are exact up
to max_disorder behind the newest stored event; further back, windowed
features follow their documented as-of rule. Item features (frequency)
answer for the empty item.

Example:
  tallyward inspect -spec market.yaml -state ./state -at 2026-03-01T12:00:00Z account acct-00042`,
		flags: func(fs *flag.FlagSet) func(*env, []string) int {
			spec, state := specFlag(fs), stateFlag(fs)
			at := fs.String("at", "", "time to answer as of, RFC 3339 (default: the newest stored event time)")
			return func(e *env, args []string) int {
				if len(args) != 2 {
					e.errorf("inspect takes ENTITY KEY (got %d arguments)", len(args))
					return exitUsage
				}
				var t int64
				if *at != "" {
					tt, err := time.Parse(time.RFC3339Nano, *at)
					if err != nil {
						e.errorf("-at: %v", err)
						return exitUsage
					}
					t = tt.UnixNano()
				}
				f, code, ok := loadSpec(e, *spec)
				if !ok {
					return code
				}
				return withCopy(e, *state, func(dir string) int {
					return inspect(e, f, dir, args[0], args[1], t)
				})
			}
		},
	})
}

// inspect reads the key's features with Pipeline.Lookup, on a copy of the
// state (closing a pipeline commits, and a commit may sweep expired
// records).
func inspect(e *env, f *specfile.File, dir, entity, key string, t int64) int {
	p, code, ok := openPipeline(e, f, dir, f.Options)
	if !ok {
		return code
	}
	defer p.Close()
	if t == 0 {
		if t = p.Stats().Newest; t == 0 {
			e.errorf("the state holds no events; give -at")
			return exitUsage
		}
	}
	erased, err := p.Erased(entity, key)
	if err == nil && erased {
		fmt.Fprintf(e.stdout, "%s %q is erased: its state was removed and later events naming it are skipped\n", entity, key)
		return exitOK
	}
	vals, exact, err := p.Lookup(entity, key, t, nil)
	if err != nil {
		e.errorf("%v", err)
		if errors.Is(err, tallyward.ErrUnknownEntity) {
			return exitUsage
		}
		return exitFailure
	}
	fmt.Fprintf(e.stdout, "%s %q as of %s\n", entity, key, specfile.FormatTime(t))
	if !exact {
		fmt.Fprintln(e.stdout, "  (older than the exact horizon behind the key's newest event: each feature follows its kind's degraded as-of rule)")
	}
	for _, ent := range f.Spec.Entities {
		if ent.Name != entity {
			continue
		}
		for i, ft := range ent.Features {
			fmt.Fprintf(e.stdout, "  %-28s %v\t%s\n", ft.Name, vals[i], ft.Kind.Describe())
		}
	}
	return exitOK
}
