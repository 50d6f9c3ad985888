package main

import (
	"bytes"
	"compress/gzip"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/parquet-go/parquet-go"
	"github.com/tallyward/tallyward"
)

// The end-to-end tests build the command (with crash-test kill points)
// and run it as a subprocess.
var binPath string

func TestMain(m *testing.M) {
	dir, err := os.MkdirTemp("", "tallyward-e2e-")
	if err != nil {
		panic(err)
	}
	binPath = filepath.Join(dir, "tallyward")
	build := exec.Command("go", "build", "-tags", "tallyward_killpoints", "-o", binPath, ".")
	build.Stderr = os.Stderr
	if err := build.Run(); err != nil {
		fmt.Fprintln(os.Stderr, "building the command:", err)
		os.Exit(1)
	}
	code := m.Run()
	os.RemoveAll(dir)
	os.Exit(code)
}

const e2eSpec = `version: 1
events:
  time: {field: ts, format: unix_ms}
  fields:
    - {name: kind, type: string}
    - {name: account, type: string}
    - {name: device, type: string}
    - {name: amount, type: number, optional: true}
run:
  mode: settled
  max_disorder: 1m
  commit_every: 700
output:
  fields: [account, device, amount]
entities:
  - name: account
    key: account
    features:
      - {name: logins_1h, kind: sliding_count, window: 1h, when: [{field: kind, equals: login}]}
      - {name: spend_24h, kind: sliding_sum, window: 24h, value: amount, when: [{field: kind, in: [pay]}]}
      - {name: devices_24h, kind: distinct, window: 24h, item: device}
      - {name: pace, kind: decayed, half_life: 2h}
  - name: device
    key: device
    features:
      - {name: accounts_24h, kind: distinct, window: 24h, item: account}
`

type ev struct {
	TS      int64   `json:"ts" parquet:"ts"`
	Kind    string  `json:"kind" parquet:"kind"`
	Account string  `json:"account" parquet:"account"`
	Device  string  `json:"device" parquet:"device"`
	Amount  float64 `json:"amount" parquet:"amount"`
}

// goSpec is e2eSpec written with the Go API, the reference the table is
// checked against.
func goSpec() (tallyward.Spec[ev], tallyward.Options) {
	return tallyward.Spec[ev]{
			Time: func(e ev) int64 { return e.TS * 1e6 },
			Entities: []tallyward.Entity[ev]{
				{Name: "account", Key: func(e ev) string { return e.Account }, Features: []tallyward.Feature[ev]{
					{Name: "logins_1h", Kind: tallyward.SlidingCount{Window: time.Hour}, Where: func(e ev) bool { return e.Kind == "login" }},
					{Name: "spend_24h", Kind: tallyward.SlidingSum{Window: 24 * time.Hour}, Value: func(e ev) float64 { return e.Amount }, Where: func(e ev) bool { return e.Kind == "pay" }},
					{Name: "devices_24h", Kind: tallyward.Distinct{Window: 24 * time.Hour}, Item: func(e ev) string { return e.Device }},
					{Name: "pace", Kind: tallyward.Decayed{HalfLife: 2 * time.Hour}},
				}},
				{Name: "device", Key: func(e ev) string { return e.Device }, Features: []tallyward.Feature[ev]{
					{Name: "accounts_24h", Kind: tallyward.Distinct{Window: 24 * time.Hour}, Item: func(e ev) string { return e.Account }},
				}},
			},
		}, tallyward.Options{Mode: tallyward.Settled, MaxDisorder: time.Minute,
			CommitEvery: -1}
}

// genInputs writes three files (JSON lines gzip, CSV, Parquet) of
// interleaved traffic, each out of order by up to 40 s, and returns the
// events in the order the command merges them (each file's order, merged
// by time, ties to the earlier file) for the reference run.
func genInputs(t *testing.T, dir string, perFile int) ([]string, []ev) {
	rng := rand.New(rand.NewPCG(11, 12))
	var paths []string
	var files [][]ev
	for i, name := range []string{"a.jsonl.gz", "b.csv", "c.parquet"} {
		evs := make([]ev, perFile)
		t0 := int64(1_767_225_600_000) + int64(i)*777
		for j := range evs {
			t0 += rng.Int64N(4000)
			e := ev{TS: t0 - rng.Int64N(40_000), Account: fmt.Sprintf("acct-%d", rng.IntN(150)), Device: fmt.Sprintf("dev-%d", rng.IntN(200))}
			if rng.IntN(3) == 0 {
				e.Kind, e.Amount = "pay", float64(rng.IntN(50000))/100
			} else {
				e.Kind = "login"
			}
			evs[j] = e
		}
		p := filepath.Join(dir, name)
		switch {
		case strings.HasSuffix(name, ".parquet"):
			if err := parquet.WriteFile(p, evs); err != nil {
				t.Fatal(err)
			}
		case strings.HasSuffix(name, ".csv"):
			var b bytes.Buffer
			b.WriteString("ts,kind,account,device,amount\n")
			for _, e := range evs {
				fmt.Fprintf(&b, "%d,%s,%s,%s,%v\n", e.TS, e.Kind, e.Account, e.Device, e.Amount)
			}
			os.WriteFile(p, b.Bytes(), 0o644)
		default:
			var b bytes.Buffer
			z := gzip.NewWriter(&b)
			for _, e := range evs {
				line, _ := json.Marshal(e)
				z.Write(append(line, '\n'))
			}
			z.Close()
			os.WriteFile(p, b.Bytes(), 0o644)
		}
		paths = append(paths, p)
		files = append(files, evs)
	}
	// The merge: repeatedly take the earliest head, ties to the earlier file.
	var merged []ev
	idx := make([]int, len(files))
	for {
		best := -1
		for i, f := range files {
			if idx[i] < len(f) && (best < 0 || f[idx[i]].TS < files[best][idx[best]].TS) {
				best = i
			}
		}
		if best < 0 {
			break
		}
		merged = append(merged, files[best][idx[best]])
		idx[best]++
	}
	return paths, merged
}

type result struct {
	code   int
	killed bool
	stderr string
}

func runCmd(t *testing.T, env []string, args ...string) result {
	t.Helper()
	cmd := exec.Command(binPath, args...)
	cmd.Env = append(os.Environ(), env...)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	cmd.Stdout = &stderr
	err := cmd.Run()
	r := result{stderr: stderr.String()}
	var ee *exec.ExitError
	if errors.As(err, &ee) {
		if ws, ok := ee.Sys().(syscall.WaitStatus); ok && ws.Signaled() && ws.Signal() == syscall.SIGKILL {
			r.killed = true
		}
		r.code = ee.ExitCode()
	} else if err != nil {
		t.Fatal(err)
	}
	return r
}

func setup(t *testing.T) (dir, spec string, inputs []string, events []ev) {
	dir = t.TempDir()
	spec = filepath.Join(dir, "spec.yaml")
	if err := os.WriteFile(spec, []byte(e2eSpec), 0o644); err != nil {
		t.Fatal(err)
	}
	n := 4000
	if testing.Short() {
		n = 1200
	}
	inputs, events = genInputs(t, dir, n)
	return dir, spec, inputs, events
}

func replayArgs(spec, state, out string, inputs []string) []string {
	return append([]string{"replay", "-spec", spec, "-state", state, "-out", out}, inputs...)
}

// readParquet reads a table back as rows of named columns.
func readParquet(t *testing.T, path string) (cols []string, rows [][]parquet.Value) {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	st, _ := f.Stat()
	pf, err := parquet.OpenFile(f, st.Size())
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range pf.Schema().Columns() {
		cols = append(cols, strings.Join(c, "."))
	}
	r := parquet.NewReader(pf)
	defer r.Close()
	buf := make([]parquet.Row, 100)
	for {
		n, err := r.ReadRows(buf)
		for _, row := range buf[:n] {
			vals := make([]parquet.Value, len(cols))
			for _, v := range row {
				vals[v.Column()] = v.Clone()
			}
			rows = append(rows, vals)
		}
		if err != nil {
			break
		}
	}
	return cols, rows
}

// TestReplayToParquetMatchesGoAPI: the command's Parquet table holds, for
// every event, exactly the features the Go API computes (bit for bit),
// with the event's time and output fields.
func TestReplayToParquetMatchesGoAPI(t *testing.T) {
	dir, spec, inputs, events := setup(t)
	out := filepath.Join(dir, "features.parquet")
	if r := runCmd(t, nil, replayArgs(spec, filepath.Join(dir, "state"), out, inputs)...); r.code != 0 {
		t.Fatalf("replay exited %d:\n%s", r.code, r.stderr)
	}
	cols, rows := readParquet(t, out)

	gs, gopts := goSpec()
	type want struct {
		e    ev
		vals []float64
	}
	var wants []want
	gs.Emit = func(r tallyward.Row[ev]) { wants = append(wants, want{r.Event, slices.Clone(r.Values)}) }
	p, err := tallyward.Open(gs, gopts)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	if err := p.Replay(t.Context(), func(yield func(ev, error) bool) {
		for _, e := range events {
			if !yield(e, nil) {
				return
			}
		}
	}); err != nil {
		t.Fatal(err)
	}
	if len(rows) != len(wants) || len(rows) != len(events) {
		t.Fatalf("%d rows in the table, %d from the Go API, %d events", len(rows), len(wants), len(events))
	}
	col := func(name string) int {
		i := slices.Index(cols, name)
		if i < 0 {
			t.Fatalf("no column %q in %v", name, cols)
		}
		return i
	}
	names := p.Names()
	for i, w := range wants {
		row := rows[i]
		if got := row[col("ts")].Int64(); got != w.e.TS*1e6 {
			t.Fatalf("row %d: time %d, want %d", i, got, w.e.TS*1e6)
		}
		if got := string(row[col("account")].ByteArray()); got != w.e.Account {
			t.Fatalf("row %d: account %q, want %q", i, got, w.e.Account)
		}
		if got := row[col("amount")].Double(); got != w.e.Amount {
			t.Fatalf("row %d: amount %v, want %v", i, got, w.e.Amount)
		}
		for j, n := range names {
			if got := row[col(n)].Double(); math.Float64bits(got) != math.Float64bits(w.vals[j]) {
				t.Fatalf("row %d %s: table %v, Go API %v", i, n, got, w.vals[j])
			}
		}
	}
}

// TestKilledReplayResumesByteIdentical: SIGKILL the replay at seeded
// points (before an event, or inside a commit between the table's sync
// and the state's), run it again each time, and the finished table is
// byte for byte that of an uninterrupted run; for Parquet and CSV.
func TestKilledReplayResumesByteIdentical(t *testing.T) {
	dir, spec, inputs, events := setup(t)
	for _, ext := range []string{"parquet", "csv"} {
		ref := filepath.Join(dir, "ref."+ext)
		if r := runCmd(t, nil, replayArgs(spec, filepath.Join(dir, "ref-state-"+ext), ref, inputs)...); r.code != 0 {
			t.Fatalf("replay exited %d:\n%s", r.code, r.stderr)
		}
		want, _ := os.ReadFile(ref)
		rng := rand.New(rand.NewPCG(5, uint64(len(ext))))
		// Chains of kills on one state directory: each run is killed at
		// a later point than the last, then a final run finishes.
		chains := 4
		if ext == "csv" || testing.Short() {
			chains = 2
		}
		kills := 0
		for c := 0; c < chains; c++ {
			state := filepath.Join(dir, fmt.Sprintf("state-%s-%d", ext, c))
			out := filepath.Join(dir, fmt.Sprintf("out-%d.%s", c, ext))
			var points []string
			for _, e := range slices.Sorted(slices.Values([]int{rng.IntN(len(events)), rng.IntN(len(events)), rng.IntN(len(events))})) {
				points = append(points, fmt.Sprintf("event:%d", e))
			}
			points = append(points, fmt.Sprintf("commit:%d", 1+rng.IntN(3)))
			for _, kp := range points {
				r := runCmd(t, []string{"TALLYWARD_KILL=" + kp}, replayArgs(spec, state, out, inputs)...)
				if r.code == 0 && !r.killed {
					continue // the point was already passed in an earlier run
				}
				if !r.killed {
					t.Fatalf("run to %s exited %d:\n%s", kp, r.code, r.stderr)
				}
				kills++
			}
			if r := runCmd(t, nil, replayArgs(spec, state, out, inputs)...); r.code != 0 {
				t.Fatalf("resumed replay exited %d:\n%s", r.code, r.stderr)
			}
			got, _ := os.ReadFile(out)
			if !bytes.Equal(got, want) {
				t.Fatalf("%s chain %d (%v): %d bytes, want %d; not identical", ext, c, points, len(got), len(want))
			}
		}
		t.Logf("%s: %d kills, output identical", ext, kills)
		if min := 2 * chains; kills < min {
			t.Errorf("%s: only %d kills happened", ext, kills)
		}
	}
}
