package tallyward

import (
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2/vfs/errorfs"
	"github.com/stretchr/testify/require"
)

// faultPoints are the filesystem operations faults are injected into.
var faultPoints = map[string]struct {
	kinds  []errorfs.OpKind
	suffix string
}{
	"wal-write":   {[]errorfs.OpKind{errorfs.OpFileWrite, errorfs.OpFileWriteAt}, ".log"},
	"wal-sync":    {[]errorfs.OpKind{errorfs.OpFileSync, errorfs.OpFileSyncData, errorfs.OpFileSyncTo}, ".log"},
	"table-read":  {[]errorfs.OpKind{errorfs.OpFileReadAt, errorfs.OpFileRead}, ".sst"},
	"table-write": {[]errorfs.OpKind{errorfs.OpFileWrite, errorfs.OpFileWriteAt}, ".sst"},
	"table-sync":  {[]errorfs.OpKind{errorfs.OpFileSync, errorfs.OpFileSyncData, errorfs.OpFileSyncTo}, ".sst"},
}

// faultIngest is the ingest threshold each point runs with: the log is
// only written by batch commits, tables mostly by ingested commits.
var faultIngest = map[string]string{"wal-write": "-1", "wal-sync": "-1", "table-read": "600", "table-write": "600", "table-sync": "600"}

// faultAt fails the n-th filesystem operation matching its point.
type faultAt struct {
	kinds  []errorfs.OpKind
	suffix string
	left   atomic.Int64
}

func (f *faultAt) MaybeError(op errorfs.Op) error {
	if !strings.HasSuffix(op.Path, f.suffix) {
		return nil
	}
	for _, k := range f.kinds {
		if op.Kind == k && f.left.Add(-1) == 0 {
			return errorfs.ErrInjected
		}
	}
	return nil
}

func (f *faultAt) String() string { return "faultAt" }

// parseFault reads "point:n" from the environment of a child.
func parseFault(t *testing.T, spec string) errorfs.Injector {
	name, nth, _ := strings.Cut(spec, ":")
	pt, ok := faultPoints[name]
	require.True(t, ok, spec)
	n, err := strconv.Atoi(nth)
	require.NoError(t, err)
	f := &faultAt{kinds: pt.kinds, suffix: pt.suffix}
	f.left.Store(int64(n))
	return f
}

// Faults from the filesystem at log write and sync points (batch commits),
// table write and sync points (ingested commits, flushes, compactions) and
// table read points, injected with
// Pebble's error-injecting filesystem into a child process working on
// disk. Every fault that fires is reported: as an error returned to the
// caller naming the injected fault (the child prints it and exits 3), or,
// for the faults Pebble itself treats as fatal (a log that cannot be
// closed), as a process failure carrying it. A restart from the last
// commit then resumes exactly: final records and every row equal an
// uninterrupted run.
func TestInjectedFaultsAreReportedAndResumeExactly(t *testing.T) {
	if testing.Short() {
		t.Skip("spawns child processes")
	}
	evs := genLogins(13, 20_000, 2_000, 800, 3*time.Second)
	wantRows, wantRecords, _ := reference(t, evs)
	r := rand.New(rand.NewPCG(23, 23))
	reported := map[string]int{}
	for _, name := range []string{"wal-write", "wal-sync", "table-read", "table-write", "table-sync"} {
		for trial := range 3 {
			dir := t.TempDir()
			// The n-th matching operation after open fails.
			n := 5 + r.IntN(map[string]int{"wal-write": 60, "wal-sync": 20, "table-read": 400, "table-write": 40, "table-sync": 15}[name])
			out, ee := runChild(t, dir, "TALLYWARD_KILL_AT=-1", fmt.Sprintf("TALLYWARD_FAULT=%s:%d", name, n), "TALLYWARD_INGEST="+faultIngest[name])
			if ee == nil {
				t.Logf("%s trial %d: operation %d never happened", name, trial, n)
			} else {
				// Returned errors print the injected error's text; Pebble's
				// own panic prints its type.
				require.True(t, strings.Contains(string(out), "injected error") || strings.Contains(string(out), "errorfs.LabelledError"),
					"%s trial %d: the fault must be reported\n%s", name, trial, out)
				if ee.ExitCode() == 3 {
					reported[name+" (returned to caller)"]++
				} else {
					reported[name+" (process stopped by storage engine)"]++
				}
			}
			for {
				if _, err := os.Stat(filepath.Join(dir, "done")); err == nil {
					break
				}
				out, ee := runChild(t, dir, "TALLYWARD_KILL_AT=-1", "TALLYWARD_INGEST="+faultIngest[name])
				require.Nil(t, ee, "restart failed: %s", out)
			}
			p, err := Open(richSpec(func(Row[login]) {}), Options{Dir: filepath.Join(dir, "db"), Mode: Settled, MaxDisorder: 3 * time.Second, ItemKey: testItemKey})
			require.NoError(t, err)
			require.Equal(t, wantRecords, dumpRecords(t, p.store.DB()), "%s trial %d", name, trial)
			require.NoError(t, p.Close())
			require.Equal(t, wantRows, readRows(t, filepath.Join(dir, "rows")), "%s trial %d", name, trial)
		}
	}
	t.Logf("faults reported: %v", reported)
	require.NotEmpty(t, reported)
}
