package main

import (
	"errors"
	"flag"
	"fmt"
	"os"
	"path/filepath"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/specfile"
)

// loadSpec loads a spec file, printing every problem. ok is false with the
// exit code to return.
func loadSpec(e *env, path string) (*specfile.File, int, bool) {
	if path == "" {
		e.errorf("-spec is required")
		return nil, exitUsage, false
	}
	f, err := specfile.Load(path)
	if err != nil {
		if errors.Is(err, specfile.ErrSpec) {
			e.errorf("invalid spec file:\n%v", err)
			return nil, exitBadSpec, false
		}
		e.errorf("%v", err)
		return nil, exitFailure, false
	}
	return f, exitOK, true
}

// openExisting opens the pipeline of f on an existing state directory.
// A directory that does not exist is an error rather than a new, empty
// store: commands that read or delete state must not invent it.
func openExisting(e *env, f *specfile.File, dir string, opts tallyward.Options) (*tallyward.Pipeline[specfile.Event], int, bool) {
	if dir == "" {
		e.errorf("-state is required")
		return nil, exitUsage, false
	}
	if _, err := os.Stat(dir); err != nil {
		e.errorf("state directory: %v", err)
		return nil, exitFailure, false
	}
	return openPipeline(e, f, dir, opts)
}

func openPipeline(e *env, f *specfile.File, dir string, opts tallyward.Options) (*tallyward.Pipeline[specfile.Event], int, bool) {
	opts.Dir = dir
	p, err := tallyward.Open(withEmit(f.Spec), opts)
	if err != nil {
		e.errorf("%v", err)
		if errors.Is(err, tallyward.ErrDefinitionChanged) {
			return nil, exitDefinitions, false
		}
		return nil, exitFailure, false
	}
	return p, exitOK, true
}

// withCopy runs fn on a temporary copy of a state directory, so that
// looking at state never changes it (opening a pipeline commits on close).
func withCopy(e *env, dir string, fn func(copyDir string) int) int {
	if dir == "" {
		e.errorf("-state is required")
		return exitUsage
	}
	tmp, err := os.MkdirTemp("", "tallyward-look-")
	if err != nil {
		e.errorf("%v", err)
		return exitFailure
	}
	defer os.RemoveAll(tmp)
	cp := filepath.Join(tmp, "state")
	if err := tallyward.CopySnapshot(dir, cp); err != nil {
		e.errorf("copying state directory: %v", err)
		return exitFailure
	}
	return fn(cp)
}

// specFlag declares the -spec flag every command takes.
func specFlag(fs *flag.FlagSet) *string {
	return fs.String("spec", "", "spec file (YAML; see specfile/REFERENCE.md) (required)")
}

func stateFlag(fs *flag.FlagSet) *string {
	return fs.String("state", "", "state directory of the pipeline (required)")
}

// withEmit gives spec a row sink that discards rows if it has none:
// Settled mode requires one, and commands that only look at or delete
// state emit nothing.
func withEmit(spec tallyward.Spec[specfile.Event]) tallyward.Spec[specfile.Event] {
	if spec.Emit == nil {
		spec.Emit = func(tallyward.Row[specfile.Event]) {}
	}
	return spec
}

// changeState is the body of a command that opens an existing state
// directory, makes one durable change (change returns what to print on
// success) and closes it: args must hold nargs arguments, else the usage
// error says takes ("erase takes ENTITY KEY").
func changeState(e *env, specPath, state string, args []string, nargs int, takes string, change func(*tallyward.Pipeline[specfile.Event]) (string, error)) int {
	if len(args) != nargs {
		e.errorf("%s (got %d arguments)", takes, len(args))
		return exitUsage
	}
	f, code, ok := loadSpec(e, specPath)
	if !ok {
		return code
	}
	p, code, ok := openExisting(e, f, state, f.Options)
	if !ok {
		return code
	}
	done, err := change(p)
	if cerr := p.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		e.errorf("%v", err)
		return exitFailure
	}
	fmt.Fprintln(e.stdout, done)
	return exitOK
}

// eventPipeline is a pipeline over the spec file's dynamic events.
type eventPipeline = tallyward.Pipeline[specfile.Event]
