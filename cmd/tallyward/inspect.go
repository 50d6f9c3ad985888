package main

import (
	"flag"
	"fmt"
	"math"
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

// inspect scores a probe event that names the key and updates nothing
// (every feature's filter refuses it), on a copy of the state.
func inspect(e *env, f *specfile.File, dir, entity, key string, t int64) int {
	spec := f.Spec
	spec.Emit = nil
	var keyField int = -1
	spec.Entities = nil
	for _, ent := range f.Spec.Entities {
		feats := make([]tallyward.Feature[specfile.Event], len(ent.Features))
		for i, ft := range ent.Features {
			ft.Where = func(specfile.Event) bool { return false }
			feats[i] = ft
		}
		ent.Features = feats
		spec.Entities = append(spec.Entities, ent)
	}
	probe := f.Schema.NewEvent()
	for _, ent := range f.Spec.Entities {
		if ent.Name == entity {
			// Find the key field by asking the key function which field
			// it reads: set each string field to the key in turn.
			for i := range f.Schema.Fields {
				ev := f.Schema.NewEvent()
				ev.Fields[i].Str = key
				if ent.Key(ev) == key {
					keyField = i
					break
				}
			}
		}
	}
	if keyField < 0 {
		e.errorf("no entity %q in %s", entity, f.Name)
		return exitUsage
	}
	probe.Fields[keyField].Str = key
	opts := f.Options
	opts.Dir = dir
	opts.Mode = tallyward.Eager
	opts.Lateness = tallyward.ApplyLate
	opts.FutureSkew = math.MaxInt64
	p, err := tallyward.Open(spec, opts)
	if err != nil {
		e.errorf("%v", err)
		return exitFailure
	}
	defer p.Close()
	if t == 0 {
		t = p.Stats().Newest
		if t == 0 {
			e.errorf("the state holds no events; give -at")
			return exitUsage
		}
	}
	probe.Time = t
	vals, err := p.Score(probe, nil)
	if err != nil {
		e.errorf("%v", err)
		return exitFailure
	}
	fmt.Fprintf(e.stdout, "%s %q as of %s\n", entity, key, specfile.FormatTime(t))
	idx := 0 // rows hold every entity's features, in spec order
	for _, ent := range f.Spec.Entities {
		for _, ft := range ent.Features {
			if ent.Name == entity {
				fmt.Fprintf(e.stdout, "  %-28s %v\t%s\n", ft.Name, vals[idx], ft.Kind.Describe())
			}
			idx++
		}
	}
	return exitOK
}
