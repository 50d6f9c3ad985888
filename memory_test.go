package tallyward

import (
	"flag"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

var memoryEntities = flag.Int("memory-entities", 0, "entities in TestMemoryWithinBudget (default 300000; 10000000 for the full check)")

// The memory budget: CacheBytes + BlockCacheBytes + 4 × MemTableBytes
// (four memtables at most before Pebble stalls writes). The peak resident
// size of a process that feeds a pipeline n new entities must stay below
// memoryFactor times the budget plus memoryBase for the Go runtime, the
// test binary and Pebble's fixed costs. The factor is our own rule of
// thumb: Go's collector lets the heap grow to twice the live data at the
// default GOGC, and a commit briefly holds a copy of what it writes.
const (
	memoryFactor = 3
	memoryBase   = 64 << 20
)

// memoryOpts is the configuration measured: a 16 MiB record cache and
// small Pebble buffers, for a budget of 56 MiB.
func memoryOpts(dir string, commitEvery int) Options {
	return Options{Dir: dir, CacheBytes: 16 << 20, BlockCacheBytes: 8 << 20, MemTableBytes: 8 << 20, CommitEvery: commitEvery, TTL: -1}
}

func memoryBudget(o Options) int64 { return o.CacheBytes + o.BlockCacheBytes + 4*o.MemTableBytes }

// TestMemoryWithinBudget feeds n events, each naming a new account, in a
// child process per commit setting (the default interval, a commit every
// million events, automatic commits off) and checks the child's peak
// resident size (VmHWM) against the budget. Records changed since the last
// commit used to be held outside the budget: 10M entities with a 16 MiB
// cache took about 300 MiB at the default interval and several GiB with
// commits rare or off.
//
//	go test -run TestMemoryWithinBudget -v -memory-entities 10000000 .
func TestMemoryWithinBudget(t *testing.T) {
	if testing.Short() {
		t.Skip("feeds hundreds of thousands of entities in child processes")
	}
	n := *memoryEntities
	if n == 0 {
		n = 300_000
	}
	for _, every := range []int{0, 1_000_000, -1} {
		t.Run(fmt.Sprint("CommitEvery=", every), func(t *testing.T) {
			dir := t.TempDir()
			cmd := exec.Command(os.Args[0], "-test.run=^TestMemoryChild$", "-test.count=1")
			cmd.Env = append(os.Environ(), fmt.Sprintf("TALLYWARD_MEMORY=%s|%d|%d", filepath.Join(dir, "db"), n, every))
			out, err := cmd.CombinedOutput()
			require.NoError(t, err, "%s", out)
			var peak, commits int64
			var reopen string
			for _, l := range strings.Split(string(out), "\n") {
				if v, ok := strings.CutPrefix(l, "PEAK "); ok {
					peak, _ = strconv.ParseInt(v, 10, 64)
				}
				if v, ok := strings.CutPrefix(l, "COMMITS "); ok {
					commits, _ = strconv.ParseInt(v, 10, 64)
				}
				if v, ok := strings.CutPrefix(l, "REOPEN "); ok {
					reopen = v
				}
			}
			require.Positive(t, peak, "%s", out)
			budget := memoryBudget(memoryOpts("", every))
			t.Logf("%d entities, CommitEvery %d: peak RSS %d MiB, budget %d MiB (%.2f×), %d commits; reopen took %s",
				n, every, peak>>20, budget>>20, float64(peak)/float64(budget), commits, reopen)
			require.Less(t, peak, memoryFactor*budget+memoryBase, "peak resident size over %d × budget + %d MiB", memoryFactor, memoryBase>>20)
		})
	}
}

// TestMemoryChild is the child side of TestMemoryWithinBudget.
func TestMemoryChild(t *testing.T) {
	env := os.Getenv("TALLYWARD_MEMORY")
	if env == "" {
		t.Skip("child of TestMemoryWithinBudget only")
	}
	f := strings.Split(env, "|")
	n, _ := strconv.Atoi(f[1])
	every, _ := strconv.Atoi(f[2])
	p, err := Open(loginSpec(nil), memoryOpts(f[0], every))
	require.NoError(t, err)
	tm := t0
	for i := range n {
		tm += int64(time.Millisecond)
		require.NoError(t, p.Process(login{T: tm, Account: "acct-" + strconv.Itoa(i), Addr: "10.0.0." + strconv.Itoa(i%200), OK: i%7 != 0}))
	}
	st := p.Stats()
	require.Equal(t, int64(n+200), st.LiveEntities)
	require.NoError(t, p.Close())
	fmt.Printf("PEAK %d\nCOMMITS %d\n", peakRSS(t), st.Commits)
	// The cost of reopening, which counts the stored records.
	began := time.Now()
	p, err = Open(loginSpec(nil), memoryOpts(f[0], every))
	require.NoError(t, err)
	fmt.Printf("REOPEN %v\n", time.Since(began))
	require.NoError(t, p.Close())
}

// peakRSS reads the process's peak resident size from /proc.
func peakRSS(t *testing.T) int64 {
	b, err := os.ReadFile("/proc/self/status")
	if err != nil {
		t.Skipf("no /proc: %v", err)
	}
	for _, l := range strings.Split(string(b), "\n") {
		if v, ok := strings.CutPrefix(l, "VmHWM:"); ok {
			kb, err := strconv.ParseInt(strings.TrimSpace(strings.TrimSuffix(strings.TrimSpace(v), "kB")), 10, 64)
			require.NoError(t, err)
			return kb << 10
		}
	}
	t.Skip("no VmHWM")
	return 0
}
