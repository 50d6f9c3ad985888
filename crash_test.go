package tallyward

import (
	"bufio"
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
	"time"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/cockroachdb/pebble/v2/vfs/errorfs"
	"github.com/stretchr/testify/require"
)

// crashOpts is the configuration every crash test runs: Settled, so that
// held events and the resume point below Seen are exercised, with a cache
// small enough to evict dirty records between commits.
func crashOpts() Options {
	// A low ingest threshold sends most commits down the ingested-table
	// path, the rest (fewer writes) down the batch path.
	return Options{Mode: Settled, MaxDisorder: 3 * time.Second, CommitEvery: -1, CacheBytes: 256 << 10, IngestThreshold: 600, ItemKey: testItemKey}
}

const crashCommitEvery = 1000

// dumpRecords returns every stored record key and value, in key order.
func dumpRecords(t testing.TB, db *pebble.DB) []string {
	t.Helper()
	it, err := db.NewIter(&pebble.IterOptions{LowerBound: []byte{0x03}, UpperBound: []byte{0x04}})
	require.NoError(t, err)
	var out []string
	for ok := it.First(); ok; ok = it.Next() {
		out = append(out, fmt.Sprintf("%q=%x", it.Key(), it.Value()))
	}
	require.NoError(t, it.Close())
	return out
}

// reference runs evs uninterrupted in memory and returns its rows and
// final records.
func reference(t *testing.T, evs []login) (map[uint64]string, []string, Stats) {
	rows := newRowLog()
	p := openTest(t, richSpec(rows.add), crashOpts())
	require.NoError(t, p.Replay(context.Background(), slice(evs)))
	return rows.rows, dumpRecords(t, p.store.DB()), p.Stats()
}

// mergeRows adds rows to all, failing on a re-emitted row that differs.
func mergeRows(t *testing.T, all, rows map[uint64]string) {
	t.Helper()
	for seq, r := range rows {
		if prev, ok := all[seq]; ok {
			require.Equal(t, prev, r, "row %d re-emitted differently after restart", seq)
		}
		all[seq] = r
	}
}

// Invariant 3 (DESIGN.md) on Pebble's crash-simulating filesystem: at
// random points the filesystem is cloned as a crash would leave it (with a
// random share of unsynced writes surviving), the pipeline reopens on the
// clone and resumes from its stored position; final records and the union
// of all rows equal an uninterrupted run.
func TestCrashCloneResumesExactly(t *testing.T) {
	evs := genLogins(11, 30_000, 3_000, 1_000, 3*time.Second)
	wantRows, wantRecords, wantStats := reference(t, evs)

	r := rand.New(rand.NewPCG(5, 5))
	trials := 6
	if testing.Short() {
		trials = 2 // the race-detector run in CI; the full run keeps 6
	}
	for trial := range trials {
		fs := vfs.NewCrashableMem()
		opts := crashOpts()
		opts.FS, opts.Dir = fs, "db"
		all := map[uint64]string{}
		for crashes := 0; ; crashes++ {
			rows := newRowLog()
			// Every restart picks its own number of workers: a store
			// written by one count resumes exactly under another.
			opts.Workers = 1 + r.IntN(3)
			p, err := Open(richSpec(rows.add), opts)
			require.NoError(t, err)
			start := p.ResumeSeq()
			stop := uint64(len(evs))
			if crashes < 3 {
				stop = start + uint64(r.IntN(len(evs)-int(start)+1))
			}
			for i := start; i < stop; i++ {
				if err := p.Process(evs[i]); err != nil {
					require.True(t, benign(err), err)
				}
				if (i+1)%crashCommitEvery == 0 {
					require.NoError(t, p.Commit(nil))
				}
			}
			if stop == uint64(len(evs)) {
				require.NoError(t, p.Flush())
				require.NoError(t, p.Commit(nil))
				mergeRows(t, all, rows.rows)
				require.Equal(t, wantRecords, dumpRecords(t, p.store.DB()), "trial %d", trial)
				got := p.Stats()
				require.Equal(t, wantStats.Applied, got.Applied)
				require.Equal(t, wantStats.Events, got.Events)
				require.NoError(t, p.Close())
				break
			}
			stopWorkersForCrash(p)
			clone := fs.CrashClone(vfs.CrashCloneCfg{UnsyncedDataPercent: r.IntN(100), RNG: rand.New(rand.NewPCG(uint64(trial), uint64(crashes)))})
			mergeRows(t, all, rows.rows)
			// The crashed process's store is abandoned, as after a real
			// crash; its in-memory filesystem goes with it.
			abandonCrashed(p)
			fs = clone
			opts.FS = fs
		}
		require.Equal(t, wantRows, all, "trial %d", trial)
	}
}

// abandonCrashed leaves p as a crashed process leaves its store: nothing
// more is written through the pipeline. The commit in flight, if any, is
// let finish first (its goroutine still reads the database after the write,
// and Pebble refuses to close under an open iterator); the crash image was
// taken before, so what it writes is not in the image.
func abandonCrashed[E any](p *Pipeline[E]) {
	p.closed = true
	_ = p.store.Settle()
	p.store.DB().Close()
}

// Invariant 3 with a real process: a child test process feeds the stream
// to a store on disk, commits every crashCommitEvery events after writing
// its rows, and kills itself with SIGKILL at a seeded random event; the
// parent restarts it until it finishes, then compares with an
// uninterrupted run.
func TestKillAndRestartProcess(t *testing.T) {
	if testing.Short() {
		t.Skip("spawns child processes")
	}
	evs := genLogins(13, 20_000, 2_000, 800, 3*time.Second)
	wantRows, wantRecords, _ := reference(t, evs)

	r := rand.New(rand.NewPCG(17, 17))
	kills := 0
	for round := 0; kills < 24; round++ {
		dir := t.TempDir()
		for {
			killAt := -1
			if r.IntN(5) != 0 { // most runs die; some get to the end
				killAt = r.IntN(len(evs))
			}
			// Each run splits records over its own number of workers.
			out, ee := runChild(t, dir, "TALLYWARD_KILL_AT="+strconv.Itoa(killAt), "TALLYWARD_WORKERS="+strconv.Itoa(1+r.IntN(3)))
			if ee != nil {
				ws, ok := ee.Sys().(syscall.WaitStatus)
				require.True(t, ok && ws.Signaled() && ws.Signal() == syscall.SIGKILL, "child failed: %v\n%s", ee, out)
				kills++
				continue
			}
			if _, err := os.Stat(filepath.Join(dir, "done")); err == nil {
				break
			}
		}
		p, err := Open(richSpec(func(Row[login]) {}), Options{Dir: filepath.Join(dir, "db"), Mode: Settled, MaxDisorder: 3 * time.Second, ItemKey: testItemKey})
		require.NoError(t, err)
		require.Equal(t, wantRecords, dumpRecords(t, p.store.DB()), "round %d", round)
		require.NoError(t, p.Close())
		require.Equal(t, wantRows, readRows(t, filepath.Join(dir, "rows")), "round %d", round)
	}
	t.Logf("%d SIGKILLs survived", kills)
}

// readRows parses the child's row file, checking that rows written twice
// (re-emitted after a restart) are identical.
func readRows(t *testing.T, path string) map[uint64]string {
	f, err := os.Open(path)
	require.NoError(t, err)
	defer f.Close()
	all := map[uint64]string{}
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		seqText, row, ok := strings.Cut(sc.Text(), "|")
		require.True(t, ok, "torn line %q", sc.Text())
		seq, err := strconv.ParseUint(seqText, 10, 64)
		require.NoError(t, err)
		mergeRows(t, all, map[uint64]string{seq: row})
	}
	require.NoError(t, sc.Err())
	return all
}

// TestKillChild is the child side of TestKillAndRestartProcess; it does
// nothing unless started by it.
func TestKillChild(t *testing.T) {
	dir := os.Getenv("TALLYWARD_CHILD_DIR")
	if dir == "" {
		t.Skip("child of TestKillAndRestartProcess only")
	}
	killAt, _ := strconv.Atoi(os.Getenv("TALLYWARD_KILL_AT"))
	evs := genLogins(13, 20_000, 2_000, 800, 3*time.Second)
	rowsFile, err := os.OpenFile(filepath.Join(dir, "rows"), os.O_CREATE|os.O_APPEND|os.O_WRONLY, 0o644)
	require.NoError(t, err)
	rows := newRowLog()
	// One write per row: a kill between rows never tears a line.
	emit := func(r Row[login]) {
		rows.add(r)
		_, err := fmt.Fprintf(rowsFile, "%d|%s\n", r.Seq, rows.rows[r.Seq])
		require.NoError(t, err)
	}
	opts := crashOpts()
	opts.Dir = filepath.Join(dir, "db")
	if spec := os.Getenv("TALLYWARD_FAULT"); spec != "" {
		opts.FS = errorfs.Wrap(vfs.Default, parseFault(t, spec))
	}
	if v := os.Getenv("TALLYWARD_INGEST"); v != "" {
		opts.IngestThreshold, _ = strconv.Atoi(v)
	}
	if v := os.Getenv("TALLYWARD_WORKERS"); v != "" {
		opts.Workers, _ = strconv.Atoi(v)
	}
	p, err := Open(richSpec(emit), opts)
	reportIfFailed(err)
	for i := p.ResumeSeq(); i < uint64(len(evs)); i++ {
		if int(i) == killAt {
			syscall.Kill(os.Getpid(), syscall.SIGKILL)
			select {} // the signal is on its way
		}
		if err := p.Process(evs[i]); err != nil && !benign(err) {
			reportIfFailed(err)
		}
		// Rows are written before the commit that makes their events
		// durable: at-least-once emission.
		if (i+1)%crashCommitEvery == 0 {
			reportIfFailed(p.Commit(nil))
			if strings.HasPrefix(os.Getenv("TALLYWARD_FAULT"), "table-read") {
				// Move committed records into tables so that lookups
				// of evicted records read them.
				reportIfFailed(p.store.DB().Flush())
			}
		}
	}
	require.NoError(t, p.Flush())
	require.NoError(t, p.Close())
	require.NoError(t, rowsFile.Close())
	require.NoError(t, os.WriteFile(filepath.Join(dir, "done"), nil, 0o644))
}

// reportIfFailed ends a child whose pipeline reported an error: exit code 3
// and the error on stderr, for the parent to check.
func reportIfFailed(err error) {
	if err != nil {
		fmt.Fprintf(os.Stderr, "REPORTED: %v\n", err)
		os.Exit(3)
	}
}

// runChild runs one child process over dir and returns its output and
// exit status.
func runChild(t *testing.T, dir string, env ...string) ([]byte, *exec.ExitError) {
	cmd := exec.Command(os.Args[0], "-test.run=^TestKillChild$", "-test.count=1")
	cmd.Env = append(append(os.Environ(), "TALLYWARD_CHILD_DIR="+dir), env...)
	out, err := cmd.CombinedOutput()
	if err == nil {
		return out, nil
	}
	var ee *exec.ExitError
	require.ErrorAs(t, err, &ee, "child did not run: %s", out)
	return out, ee
}
