// Command speedtable re-measures the speed table of the six-feature
// workload in one run and prints it: it runs the benchmarks of package
// bench (go test -bench, each in its own process) and the signin demo,
// reads their reported metrics and prints one row per figure beside its
// target.
//
//	go run ./bench/cmd/speedtable                 # full size, about 5-10 min on 2 cores
//	go run ./bench/cmd/speedtable -accounts 200000 -devices 600000 -events 1000000    # a fifth, quicker
//
// Run it from the module root. Every figure comes from a benchmark that
// measures its baseline in the same process (naive store, in-memory
// ceiling, one goroutine); nothing here is asserted.
package main

import (
	"bufio"
	"bytes"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"os/exec"
	"regexp"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"time"
)

func main() {
	accounts := flag.Int("accounts", 1_000_000, "accounts of the six-feature workload")
	devices := flag.Int("devices", 3_000_000, "devices of the six-feature workload")
	events := flag.Int("events", 5_000_000, "events of the six-feature workload")
	naive := flag.Int("naive", 200_000, "events the six-feature naive baseline is timed on")
	oneFeature := flag.Int("one-feature-events", 2_000_000, "timed events of the one-feature runs (after 2M warm-up events)")
	signin := flag.Int("signin-events", 1_000_000, "sign-in attempts the demo generates (five sixths are replayed)")
	workerList := flag.String("workers", fmt.Sprintf("1,%d", runtime.GOMAXPROCS(0)), "Options.Workers values of the six-feature Eager and Settled rows; the last one is used for every other row")
	verbose := flag.Bool("v", false, "echo the benchmarks' output")
	pacedRate := flag.Int("paced-rate", 50_000, "calls per second of the paced inline Score row (0: no such row)")
	flag.Parse()
	var workers []int
	for _, f := range strings.Split(*workerList, ",") {
		w, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || w < 1 {
			fmt.Fprintf(os.Stderr, "speedtable: -workers %q: want a list of counts >= 1\n", *workerList)
			os.Exit(2)
		}
		if !slices.Contains(workers, w) {
			workers = append(workers, w)
		}
	}
	wmax := workers[len(workers)-1]
	start := time.Now()
	m := &measurer{verbose: *verbose}
	wl := []string{"-features.accounts", strconv.Itoa(*accounts), "-features.devices", strconv.Itoa(*devices),
		"-features.events", strconv.Itoa(*events), "-features.naive-events", strconv.Itoa(*naive)}
	withWorkers := func(w int, args []string) []string { return append(slices.Clone(args), "-workers", strconv.Itoa(w)) }
	feats := map[int]map[string]map[string]float64{}
	for _, w := range workers {
		feats[w] = m.bench("^BenchmarkFeatures$/^(eager|settled)$", "1x", withWorkers(w, wl))
	}
	refs := m.bench("^BenchmarkFeatures$/^(naive|ceiling)$", "1x", wl)
	lat := m.bench("^BenchmarkFeaturesLatency$", "1x", withWorkers(wmax, wl))
	var paced map[string]map[string]float64
	if *pacedRate > 0 {
		paced = m.bench("^BenchmarkFeaturesLatency$", "1x", append(withWorkers(wmax, wl), "-features.rate", strconv.Itoa(*pacedRate)))
	}
	live := m.bench("^BenchmarkLive$", "1x", withWorkers(wmax, wl))
	n := fmt.Sprintf("%dx", *oneFeature)
	one := m.bench("^BenchmarkProcess$/^disk/cache-fits/warm$", n, withWorkers(wmax, nil))
	oneNaive := m.bench("^BenchmarkNaiveGetSet$/^disk$/^warm$", n, nil)
	oneCeil := m.bench("^BenchmarkCeilingRings$", n, nil)
	demo := m.signin(*signin)
	if m.err != nil {
		fmt.Fprintln(os.Stderr, "speedtable:", m.err)
		os.Exit(1)
	}

	get := func(r map[string]map[string]float64, name, unit string) float64 {
		if v, ok := r[name][unit]; ok {
			return v
		}
		return math.NaN()
	}
	eager, settled := "BenchmarkFeatures/eager", "BenchmarkFeatures/settled"
	w := os.Stdout
	fmt.Fprintf(w, "| workload | measured | target |\n|---|---|---|\n")
	row := func(name, measured, target string) { fmt.Fprintf(w, "| %s | %s | %s |\n", name, measured, target) }
	for _, wk := range workers {
		feat := feats[wk]
		row(fmt.Sprintf("6 features, Eager, on disk, %d worker(s) (%d accounts, %d devices, %d events)", wk, *accounts, *devices, *events),
			fmt.Sprintf("%.0f events/s; %.2f allocs/event; %.0f B heap/cached entity; hit rate %.2f (%.0f of %.0f live cached); %.1f x naive, %.2f x ceiling",
				get(feat, eager, "events/s"), get(feat, eager, "allocs/event"), get(feat, eager, "heapB/entity"), get(feat, eager, "hit-rate"),
				get(feat, eager, "cached"), get(feat, eager, "live"),
				get(feat, eager, "events/s")/get(refs, "BenchmarkFeatures/naive", "events/s"),
				get(feat, eager, "events/s")/get(refs, "BenchmarkFeatures/ceiling", "events/s")),
			">= 500k events/s using both cores, >= 250k on one; <= 1 alloc/event; <= 1 KiB heap/entity")
		row(fmt.Sprintf("6 features, Settled (MaxDisorder 30 s), on disk, %d worker(s)", wk),
			fmt.Sprintf("%.0f events/s; %.2f allocs/event; %.0f B heap/cached entity",
				get(feat, settled, "events/s"), get(feat, settled, "allocs/event"), get(feat, settled, "heapB/entity")),
			">= 400k events/s; <= 2 allocs/event")
	}
	l := "BenchmarkFeaturesLatency"
	latency := func(name string, lat map[string]map[string]float64) {
		row(name,
			fmt.Sprintf("cache hits p50 %.1f us, p99 %.1f us; all calls p99.9 %.0f us, max %.1f ms; calls cutting a commit median %.0f us, max %.1f ms, %.0f of %.0f over 1 ms; calls within 1 s after a cut p99 %.0f us, max %.1f ms; worst call #%.0f (cut a commit: %v)",
				get(lat, l, "p50-hit-ns")/1e3, get(lat, l, "p99-hit-ns")/1e3, get(lat, l, "p99.9-ns")/1e3, get(lat, l, "max-ns")/1e6,
				get(lat, l, "p50-cut-call-ns")/1e3, get(lat, l, "max-cut-call-ns")/1e6, get(lat, l, "cut-calls-over-1ms"), get(lat, l, "cut-calls"),
				get(lat, l, "p99-after-cut-ns")/1e3, get(lat, l, "max-after-cut-ns")/1e6,
				get(lat, l, "worst-call"), get(lat, l, "worst-cut") == 1),
			"p99 <= 20 us on cache hits; no call > 1 ms because of a commit")
	}
	latency(fmt.Sprintf("inline Score, 6 features, warm store, commits every 100k events, calls back to back, %d worker(s)", wmax), lat)
	if paced != nil {
		latency(fmt.Sprintf("the same, calls paced at %d/s", *pacedRate), paced)
	}
	oneEPS := get(one, "BenchmarkProcess/disk/cache-fits/warm", "events/s")
	row(fmt.Sprintf("1 feature (10 min sliding count), 1M keys, Zipf(1.1), Eager, on disk, %d worker(s); pipeline, naive and ceiling each after the same 2M untimed events", wmax),
		fmt.Sprintf("%.2f us/event; %.1f x naive per-event Pebble Get+Set; %.0f%% of the in-memory ring ceiling",
			1e6/oneEPS, oneEPS/get(oneNaive, "BenchmarkNaiveGetSet/disk/warm", "events/s"), 100*oneEPS/get(oneCeil, "BenchmarkCeilingRings", "events/s")),
		">= 10x naive; >= 25% of the ceiling")
	g1 := get(live, "BenchmarkLive/g1", "events/s")
	g2, g4, g16 := get(live, "BenchmarkLive/g2", "events/s"), get(live, "BenchmarkLive/g4", "events/s"), get(live, "BenchmarkLive/g16", "events/s")
	row(fmt.Sprintf("Live.Score from 1 / 2 / 4 / 16 goroutines (6 features, on disk, %d worker(s))", wmax),
		fmt.Sprintf("%.0f / %.0f / %.0f / %.0f events/s: %.2f x, %.2f x and %.2f x of one goroutine; cores busy %.2f / %.2f / %.2f / %.2f, so at most %.2f x with every core busy at one goroutine's CPU per event",
			g1, g2, g4, g16, g2/g1, g4/g1, g16/g1,
			get(live, "BenchmarkLive/g1", "cores"), get(live, "BenchmarkLive/g2", "cores"), get(live, "BenchmarkLive/g4", "cores"), get(live, "BenchmarkLive/g16", "cores"),
			float64(runtime.NumCPU())/get(live, "BenchmarkLive/g1", "cores")),
		">= 1.6x of one goroutine on 2 cores")
	row("signin demo replay (7 features, 2 entity kinds, Settled, on disk)",
		fmt.Sprintf("%.0f events/s (%d attempts in %v)", float64(demo.events)/demo.took.Seconds(), demo.events, demo.took.Round(time.Millisecond)),
		">= 500k events/s")
	fmt.Printf("\n%s; took %v\n", machine(), time.Since(start).Round(time.Second))
}

type measurer struct {
	verbose bool
	err     error
}

// bench runs go test -bench for one pattern and returns each benchmark's
// metrics by name (the -GOMAXPROCS suffix removed) and unit.
func (m *measurer) bench(pattern, benchtime string, args []string) map[string]map[string]float64 {
	if m.err != nil {
		return nil
	}
	cmd := append([]string{"test", "./bench/", "-run", "^$", "-bench", pattern, "-benchtime", benchtime, "-benchmem", "-timeout", "2h"}, "-args")
	out, err := m.run("go", append(cmd, args...)...)
	if err != nil {
		m.err = fmt.Errorf("go test -bench %s: %w", pattern, err)
		return nil
	}
	return parseBench(out)
}

func (m *measurer) run(name string, args ...string) ([]byte, error) {
	fmt.Fprintf(os.Stderr, "running %s %s\n", name, strings.Join(args, " "))
	var buf bytes.Buffer
	cmd := exec.Command(name, args...)
	cmd.Stdout, cmd.Stderr = &buf, &buf
	if m.verbose {
		cmd.Stdout, cmd.Stderr = io.MultiWriter(&buf, os.Stderr), io.MultiWriter(&buf, os.Stderr)
	}
	if err := cmd.Run(); err != nil {
		return nil, fmt.Errorf("%w\n%s", err, buf.Bytes())
	}
	return buf.Bytes(), nil
}

var procSuffix = regexp.MustCompile(`-\d+$`)

// parseBench reads the standard benchmark result lines: a name, the
// iteration count, then value-unit pairs.
func parseBench(out []byte) map[string]map[string]float64 {
	res := map[string]map[string]float64{}
	s := bufio.NewScanner(bytes.NewReader(out))
	for s.Scan() {
		f := strings.Fields(s.Text())
		if len(f) < 4 || !strings.HasPrefix(f[0], "Benchmark") {
			continue
		}
		if _, err := strconv.Atoi(f[1]); err != nil {
			continue
		}
		name := procSuffix.ReplaceAllString(f[0], "")
		res[name] = map[string]float64{}
		for i := 2; i+1 < len(f); i += 2 {
			if v, err := strconv.ParseFloat(f[i], 64); err == nil {
				res[name][f[i+1]] = v
			}
		}
	}
	return res
}

type demoRun struct {
	events int
	took   time.Duration
}

var replayed = regexp.MustCompile(`replayed (\d+) sign-in attempts in (\S+),`)

// signin builds and runs the demo and reads its replay line.
func (m *measurer) signin(n int) demoRun {
	if m.err != nil {
		return demoRun{}
	}
	dir, err := os.MkdirTemp("", "speedtable-")
	if err != nil {
		m.err = err
		return demoRun{}
	}
	defer os.RemoveAll(dir)
	bin := dir + "/signin"
	if _, err := m.run("go", "build", "-o", bin, "./examples/signin"); err != nil {
		m.err = err
		return demoRun{}
	}
	out, err := m.run(bin, "-events", strconv.Itoa(n))
	if err != nil {
		m.err = err
		return demoRun{}
	}
	g := replayed.FindSubmatch(out)
	if g == nil {
		m.err = fmt.Errorf("signin: no replay line in\n%s", out)
		return demoRun{}
	}
	k, _ := strconv.Atoi(string(g[1]))
	d, err := time.ParseDuration(string(g[2]))
	if err != nil {
		m.err = fmt.Errorf("signin: %w", err)
	}
	return demoRun{events: k, took: d}
}

// machine names the cores, the Go version and the load average (the
// development machine is shared).
func machine() string {
	load := ""
	if b, err := os.ReadFile("/proc/loadavg"); err == nil {
		if f := strings.Fields(string(b)); len(f) >= 3 {
			load = fmt.Sprintf(", load average %s %s %s", f[0], f[1], f[2])
		}
	}
	out, _ := exec.Command("go", "version").Output()
	return fmt.Sprintf("%d cores, %s%s", runtime.NumCPU(), strings.TrimSpace(string(out)), load)
}
