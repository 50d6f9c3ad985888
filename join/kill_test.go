package join

import (
	"bufio"
	"bytes"
	"context"
	"fmt"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"

	"github.com/stretchr/testify/require"
)

const killEvents = 20_000

func killHistory() []act {
	h := genHistory(13, killEvents, 400, spanGap(killEvents, 40))
	return shuffleWithin(rand.New(rand.NewPCG(13, 13)), h.evs, 3*minute)
}

// killOpts: the allowed disorder, and a commit every 997 events (a prime,
// so commits fall at varying places relative to the watermark's steps).
func killOpts() (o struct {
	disorder int64
	every    int
}) {
	o.disorder, o.every = 3*minute, 997
	return o
}

// Crash equivalence through the joins (invariants 3 and 10, DESIGN.md): a
// child process runs the three joins over a history and SIGKILLs itself
// at a seeded event, again and again, each run resuming from the
// pipeline's stored position. The training-row file (the JSON lines sink,
// trimmed to the committed rows on each restart) holds every row exactly
// once, equal to an uninterrupted run; the interval and as-of outputs
// (plain lines, at-least-once) equal it once duplicates, checked
// identical, are merged.
func TestKillAndRestartThroughJoins(t *testing.T) {
	if testing.Short() {
		t.Skip("spawns child processes")
	}
	want := killReference(t)
	r := rand.New(rand.NewPCG(21, 21))
	kills := 0
	for round := 0; kills < 24; round++ {
		dir := t.TempDir()
		for {
			killAt := -1
			if r.IntN(4) != 0 {
				killAt = r.IntN(killEvents + killEvents/4)
			}
			cmd := exec.Command(os.Args[0], "-test.run=^TestJoinKillChild$", "-test.count=1")
			cmd.Env = append(os.Environ(), "TALLYWARD_JOIN_CHILD_DIR="+dir, "TALLYWARD_JOIN_KILL_AT="+strconv.Itoa(killAt))
			out, err := cmd.CombinedOutput()
			if err != nil {
				ee, ok := err.(*exec.ExitError)
				require.True(t, ok, "child did not run: %v\n%s", err, out)
				ws, ok := ee.Sys().(syscall.WaitStatus)
				require.True(t, ok && ws.Signaled() && ws.Signal() == syscall.SIGKILL, "child failed: %v\n%s", ee, out)
				kills++
				continue
			}
			if _, err := os.Stat(filepath.Join(dir, "done")); err == nil {
				break
			}
		}
		got := readOutputs(t, filepath.Join(dir, "labels.jsonl"), filepath.Join(dir, "joins.txt"))
		require.Equal(t, len(want), len(got), "round %d", round)
		require.Equal(t, want, got, "round %d", round)
	}
	t.Logf("%d SIGKILLs survived; %d outputs equal to the uninterrupted run", kills, len(want))
}

// killReference is the uninterrupted run, in process, rendered as the
// child renders.
func killReference(t *testing.T) map[string]string {
	var rows bytes.Buffer
	var other strings.Builder
	o := killOpts()
	jl := NewJSONLines(&rows)
	j := openJoined(t, settled(o.disorder), jl,
		func(m Match[act]) { k, l := renderMatch(m); fmt.Fprintf(&other, "%s|%s\n", k, l) },
		func(a Attached[act]) { k, l := renderAttached(a); fmt.Fprintf(&other, "%s|%s\n", k, l) })
	require.NoError(t, j.p.Replay(context.Background(), source(killHistory())))
	require.NoError(t, jl.Flush())
	require.NoError(t, j.p.Close())
	dir := t.TempDir()
	require.NoError(t, os.WriteFile(filepath.Join(dir, "l"), rows.Bytes(), 0o644))
	require.NoError(t, os.WriteFile(filepath.Join(dir, "o"), []byte(other.String()), 0o644))
	return readOutputs(t, filepath.Join(dir, "l"), filepath.Join(dir, "o"))
}

// readOutputs reads both output files, keyed by join and Seq, checking
// that an output written twice (after a restart) is identical.
func readOutputs(t *testing.T, rowsPath, otherPath string) map[string]string {
	all := map[string]string{}
	put := func(k, v string) {
		if prev, ok := all[k]; ok {
			require.Equal(t, prev, v, "%s written twice, differently", k)
		}
		all[k] = v
	}
	for _, path := range []string{rowsPath, otherPath} {
		f, err := os.Open(path)
		require.NoError(t, err)
		sc := bufio.NewScanner(f)
		sc.Buffer(nil, 1<<20)
		next := 0
		for sc.Scan() {
			line := sc.Text()
			if path == rowsPath {
				// {"seq":N,...}; trimmed on every restart, so each row
				// is in the file once, in order: exactly-once.
				rest, ok := strings.CutPrefix(line, `{"seq":`)
				require.True(t, ok, "torn line %q", line)
				n, _, ok := strings.Cut(rest, ",")
				require.True(t, ok && strings.HasSuffix(line, "}}"), "torn line %q", line)
				require.Equal(t, strconv.Itoa(next), n, "rows in order, each once")
				next++
				put("L"+n, line)
				continue
			}
			k, v, ok := strings.Cut(line, "|")
			require.True(t, ok, "torn line %q", line)
			put(k, v)
		}
		require.NoError(t, sc.Err())
		f.Close()
	}
	return all
}

// TestJoinKillChild is the child side of TestKillAndRestartThroughJoins;
// it does nothing unless started by it.
func TestJoinKillChild(t *testing.T) {
	dir := os.Getenv("TALLYWARD_JOIN_CHILD_DIR")
	if dir == "" {
		t.Skip("child of TestKillAndRestartThroughJoins only")
	}
	killAt, _ := strconv.Atoi(os.Getenv("TALLYWARD_JOIN_KILL_AT"))
	evs := killHistory()
	open := func(name string) *os.File {
		f, err := os.OpenFile(filepath.Join(dir, name), os.O_CREATE|os.O_APPEND|os.O_WRONLY, 0o644)
		require.NoError(t, err)
		return f
	}
	rows, other := open("labels.jsonl"), open("joins.txt")
	// One write per line: a kill between writes never tears a line.
	line := func(k, l string) {
		_, err := fmt.Fprintf(other, "%s|%s\n", k, l)
		require.NoError(t, err)
	}
	o := killOpts()
	opts := settled(o.disorder)
	opts.Dir = filepath.Join(dir, "db")
	opts.CommitEvery = o.every
	jl := NewJSONLines(rows)
	j := openJoined(t, opts, jl,
		func(m Match[act]) { line(renderMatch(m)) },
		func(a Attached[act]) { line(renderAttached(a)) })
	require.NoError(t, TrimJSONLines(filepath.Join(dir, "labels.jsonl"), j.lj.Stats().Rows))
	// Kills land among events, and a share of them between the flush and
	// the final commit (index >= len(evs)).
	for i := j.p.ResumeSeq(); i < uint64(len(evs)); i++ {
		if int(i) == killAt {
			syscall.Kill(os.Getpid(), syscall.SIGKILL)
			select {}
		}
		require.NoError(t, j.p.Process(evs[i]))
	}
	require.NoError(t, j.p.Flush())
	if killAt >= len(evs) {
		syscall.Kill(os.Getpid(), syscall.SIGKILL)
		select {}
	}
	require.NoError(t, j.p.Close())
	require.NoError(t, rows.Close())
	require.NoError(t, other.Close())
	require.NoError(t, os.WriteFile(filepath.Join(dir, "done"), nil, 0o644))
}
