package main

import (
	"context"
	"encoding/binary"
	"errors"
	"flag"
	"fmt"
	"os"
	"os/signal"
	"runtime"
	"slices"
	"strings"
	"syscall"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/sink"
	"github.com/tallyward/tallyward/source"
	"github.com/tallyward/tallyward/specfile"
)

func init() {
	register(&command{
		name:    "replay",
		summary: "compute a feature table from event files (resumable)",
		help: `
usage: tallyward replay -spec FILE -state DIR -out TABLE [flags] INPUT...

Reads the input files (JSON lines, CSV or Parquet; .gz and .zst
compressed text files too), merged into one stream by event time, through
the spec file's features, and writes one row per event to TABLE (.csv,
.jsonl or .parquet): the event time, the spec's output fields, then every
feature as of that event.

Resumable and exactly-once: state lives in DIR and is committed every
run.commit_every events together with the input position and the table's
committed length. If a run is killed, run the same command again: it
truncates the table to the last commit, seeks the inputs there and
carries on; the finished table is byte for byte that of an uninterrupted
run. A Parquet table is staged in TABLE.rows and written at the end.

Each input file must be in time order within run.max_disorder (or give
-sort-files). Bad rows are reported with file:line on stderr and counted;
more than -max-bad-rows of them stop the run (exit code 4).

Progress (events, events/s, watermark, ETA) goes to stderr when it is a
terminal.

Example:
  tallyward replay -spec market.yaml -state ./state -out features.parquet \
      events-2026-02.jsonl.gz events-2026-03.jsonl.gz`,
		flags: func(fs *flag.FlagSet) func(*env, []string) int {
			o := replayFlags{}
			o.spec = specFlag(fs)
			o.state = stateFlag(fs)
			fs.StringVar(&o.out, "out", "", "feature table to write: .csv, .jsonl or .parquet (required)")
			fs.Int64Var(&o.maxBad, "max-bad-rows", 0, "rejected rows tolerated before the run stops; -1: no limit")
			fs.BoolVar(&o.sortFiles, "sort-files", false, "read each input whole and sort it by time instead of requiring time order")
			fs.StringVar(&o.reset, "reset", "", "comma-separated features (entity.feature) whose changed definition may discard their stored state")
			fs.StringVar(&o.progress, "progress", "auto", "progress on stderr: auto (when a terminal), always, never")
			fs.IntVar(&o.workers, "workers", runtime.GOMAXPROCS(0), "goroutines the entity records are split over (the table is the same for any number)")
			return func(e *env, args []string) int { return replay(e, &o, args) }
		},
	})
}

type replayFlags struct {
	spec, state *string
	out, reset  string
	progress    string
	maxBad      int64
	sortFiles   bool
	workers     int
}

// The pipeline cursor a replay stores:
//
//	byte     version (1)
//	uvarint  the table's committed length
//	bytes    the source cursor (package source)
const replayCursorVersion = 1

// maxShownBad bounds the bad rows printed one by one.
const maxShownBad = 100

func replay(e *env, o *replayFlags, inputs []string) int {
	e = &env{stdout: e.stdout, stderr: &lockedWriter{w: e.stderr}}
	if len(inputs) == 0 {
		e.errorf("replay needs at least one input file")
		return exitUsage
	}
	if o.out == "" || *o.state == "" {
		e.errorf("-out and -state are required")
		return exitUsage
	}
	format, err := sink.FormatOf(o.out)
	if err != nil {
		e.errorf("%v", err)
		return exitUsage
	}
	f, code, ok := loadSpec(e, *o.spec)
	if !ok {
		return code
	}
	var table sink.Table
	row := sink.Row{Fields: make([]specfile.Value, len(f.OutputFields))}
	var writeErr error
	spec := f.Spec
	spec.Emit = func(r tallyward.Row[specfile.Event]) {
		for i, fi := range f.OutputFields {
			row.Fields[i] = r.Event.Fields[fi]
		}
		row.Time, row.Values = r.Time, r.Values
		if err := table.Write(row); err != nil && writeErr == nil {
			writeErr = err
		}
	}
	opts := f.Options
	opts.Dir = *o.state
	opts.Workers = o.workers
	if o.reset != "" {
		opts.ResetFeatures = strings.Split(o.reset, ",")
	}
	p, err := tallyward.Open(spec, opts)
	if err != nil {
		e.errorf("%v", err)
		if errors.Is(err, tallyward.ErrDefinitionChanged) {
			return exitDefinitions
		}
		return exitFailure
	}
	defer p.Close()
	for _, n := range p.Notices() {
		e.errorf("%s", n)
	}

	committed, srcCursor := int64(-1), []byte(nil)
	if c := p.Cursor(); len(c) > 0 {
		if c[0] != replayCursorVersion {
			e.errorf("state directory %s: unknown cursor version %d (written by another program?)", *o.state, c[0])
			return exitFailure
		}
		n, k := binary.Uvarint(c[1:])
		if k <= 0 {
			e.errorf("state directory %s: damaged cursor", *o.state)
			return exitFailure
		}
		committed, srcCursor = int64(n), c[1+k:]
	} else if p.ResumeSeq() != 0 {
		e.errorf("state directory %s holds progress but no replay position (written by another program?)", *o.state)
		return exitFailure
	}

	cols := sink.Columns{Time: f.Schema.TimeField, Features: p.Names()}
	for _, fi := range f.OutputFields {
		cols.Fields = append(cols.Fields, f.Schema.Fields[fi])
	}
	table, err = sink.Open(o.out, format, cols, committed)
	if err != nil {
		e.errorf("%v", err)
		return exitFailure
	}
	shownBad := 0
	srcOpts := source.Options{
		MaxDisorder: f.Options.MaxDisorder,
		SortFiles:   o.sortFiles,
		MaxBadRows:  o.maxBad,
		OnBadRow: func(re *source.RowError) {
			// The first ones are told; after that only the count, at the end.
			if shownBad++; shownBad <= maxShownBad {
				e.errorf("bad row: %v", re)
			} else if shownBad == maxShownBad+1 {
				e.errorf("more bad rows; not showing them")
			}
		},
	}
	rd, err := source.Open(inputs, f.Schema, srcOpts, srcCursor, p.ResumeSeq())
	if err != nil {
		e.errorf("%v", err)
		return exitFailure
	}
	defer rd.Close()

	commits := 0
	p.SetCommitHook(func(cp tallyward.CommitPoint) ([]byte, error) {
		if writeErr != nil {
			return nil, writeErr
		}
		n, err := table.Commit()
		if err != nil {
			return nil, err
		}
		sc, err := rd.CursorAt(cp.Resume)
		if err != nil {
			return nil, err
		}
		commits++
		killPoint("commit", uint64(commits))
		c := binary.AppendUvarint([]byte{replayCursorVersion}, uint64(n))
		return append(c, sc...), nil
	})

	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	prog := newProgress(e, o.progress, p, rd)
	// Decoding runs ahead on a goroutine of its own, overlapping the
	// pipeline's work; bad rows are then told from there (e.stderr is
	// locked for it above).
	events := prog.wrap(source.Ahead(rd.Events()), p.ResumeSeq())
	err = p.Replay(ctx, events)
	prog.done()
	if err == nil {
		err = writeErr
	}
	if err != nil {
		e.errorf("%v", err)
		if errors.Is(err, source.ErrTooManyBadRows) || errors.Is(err, source.ErrDisorder) {
			return exitBadInput
		}
		return exitFailure
	}
	// The last commit (in Replay) covered every row; closing the table
	// finishes it, and later commits (Close) must not touch it.
	p.SetCommitHook(nil)
	if err := table.Close(); err != nil {
		e.errorf("%v", err)
		return exitFailure
	}
	st := p.Stats()
	var rejected []string
	for r, n := range st.Rejected {
		if n > 0 {
			rejected = append(rejected, fmt.Sprintf("%d %v", n, r))
		}
	}
	slices.Sort(rejected)
	fmt.Fprintf(e.stderr, "replay: %d events, %d rows, %d bad rows, rejected: [%s], %d late; table %s\n",
		st.Events, st.Emitted, rd.BadRows(), strings.Join(rejected, ", "), st.Late, o.out)
	if st.Rejected[tallyward.FutureTime] > 0 {
		e.errorf("hint: events after a quiet spell longer than run.future_skew (default 1h) are rejected as future-time; history with nights or weekends needs a larger future_skew")
	}
	if err := p.Close(); err != nil {
		e.errorf("%v", err)
		return exitFailure
	}
	return exitOK
}
