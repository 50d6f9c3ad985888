// Command tallyward runs the feature definitions of a spec file over
// files of events and manages the state a run keeps.
//
//	tallyward <command> [flags] [args]
//
// Commands (each takes --help, with a worked example):
//
//	replay    compute a feature table from event files (resumable)
//	check     validate a spec file; show stored definitions and what a change would reset
//	inspect   show the stored state of one entity key as of a time
//	erase     delete every stored trace of one entity key, durably
//	snapshot  write a consistent copy of a state directory
//	accuracy  measure sketch error against exact counts; write a report with plots
//	serve     run the features of a spec file as an HTTP/JSON service
//
// Exit codes:
//
//	0  success
//	1  failure while running (I/O, storage)
//	2  usage: unknown command, bad flags or arguments
//	3  the spec file is invalid
//	4  bad input data: more rejected rows than allowed, or a file out of
//	   time order beyond max_disorder
//	5  the stored feature definitions differ from the spec file
package main

import (
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"slices"
	"strings"
	"sync"
)

// Exit codes; documented in the package comment and in usage.
const (
	exitOK          = 0
	exitFailure     = 1
	exitUsage       = 2
	exitBadSpec     = 3
	exitBadInput    = 4
	exitDefinitions = 5
)

const exitCodesHelp = `Exit codes: 0 success, 1 failure while running, 2 usage error,
3 invalid spec file, 4 bad input data, 5 stored definitions differ.`

// command is one subcommand. Each lives in its own file and registers
// itself from init, so commands are added without editing this file.
type command struct {
	name    string
	summary string
	// help is the text after the usage line: what the command does, its
	// flags (printed from the flag set) and a worked example.
	help string
	// flags declares the command's flags on fs and returns the function
	// that runs it with the remaining arguments.
	flags func(fs *flag.FlagSet) func(env *env, args []string) int
}

var commands = map[string]*command{}

func register(c *command) { commands[c.name] = c }

// env is what a command may touch: its output streams. Tests run the
// built binary, so nothing else is injected.
type env struct {
	stdout, stderr io.Writer
}

// lockedWriter serialises writes from several goroutines (the replay's
// reading goroutine tells bad rows while the progress line is drawn).
type lockedWriter struct {
	mu sync.Mutex
	w  io.Writer
}

func (l *lockedWriter) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.w.Write(p)
}

func (e *env) errorf(format string, args ...any) {
	fmt.Fprintf(e.stderr, "tallyward: "+format+"\n", args...)
}

func main() {
	os.Exit(run(os.Args[1:], os.Stdout, os.Stderr))
}

func run(args []string, stdout, stderr io.Writer) int {
	e := &env{stdout: stdout, stderr: stderr}
	if len(args) == 0 {
		usage(stderr)
		return exitUsage
	}
	name := args[0]
	switch name {
	case "-h", "-help", "--help", "help":
		if len(args) > 1 {
			if c, ok := commands[args[1]]; ok {
				fs := newFlagSet(c, stdout)
				c.flags(fs)
				fs.Usage()
				return exitOK
			}
		}
		usage(stdout)
		return exitOK
	}
	c, ok := commands[name]
	if !ok {
		e.errorf("unknown command %q", name)
		usage(stderr)
		return exitUsage
	}
	fs := newFlagSet(c, stderr)
	runFn := c.flags(fs)
	if err := fs.Parse(args[1:]); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			fs.SetOutput(stdout)
			fs.Usage()
			return exitOK
		}
		return exitUsage
	}
	return runFn(e, fs.Args())
}

func newFlagSet(c *command, out io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(c.name, flag.ContinueOnError)
	fs.SetOutput(out)
	fs.Usage = func() {
		w := fs.Output()
		fmt.Fprintf(w, "tallyward %s: %s\n\n", c.name, c.summary)
		fmt.Fprintln(w, strings.TrimSpace(c.help))
		fmt.Fprintln(w, "\nFlags:")
		fs.PrintDefaults()
		fmt.Fprintln(w, "\n"+exitCodesHelp)
	}
	return fs
}

func usage(w io.Writer) {
	fmt.Fprintln(w, "usage: tallyward <command> [flags] [args]\n\nCommands:")
	var names []string
	for n := range commands {
		names = append(names, n)
	}
	slices.Sort(names)
	for _, n := range names {
		fmt.Fprintf(w, "  %-9s %s\n", n, commands[n].summary)
	}
	fmt.Fprintln(w, "\nRun 'tallyward <command> --help' for a command's flags and an example.")
	fmt.Fprintln(w, exitCodesHelp)
}
