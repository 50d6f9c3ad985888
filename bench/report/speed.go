package report

import (
	"fmt"
	"math"
	"os"
	"runtime"
	"slices"
	"syscall"
	"time"

	"github.com/cockroachdb/pebble/v2/vfs"
	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/bench/workload"
	"github.com/tallyward/tallyward/internal/store"
)

// SpeedConfig sizes the speed report. Zero fields mean their defaults.
type SpeedConfig struct {
	// Huge adds the 10M-entity runs. Default false.
	Huge bool
	// Events per pipeline run. Default 1M.
	Events int
	// NaiveEvents is the prefix the naive baseline processes, for when it
	// is too slow to run every event. Default: every event, so both do the
	// same work on stores of the same size.
	NaiveEvents int
	// Entities is the number of accounts (and of devices) of the main
	// matrix. Default 1M.
	Entities int
	// Dir holds the on-disk stores. Default: a new temporary directory.
	Dir string
}

func (c SpeedConfig) withDefaults() SpeedConfig {
	c.Events = cmpOr(c.Events, 1_000_000)
	c.NaiveEvents = cmpOr(c.NaiveEvents, c.Events)
	c.Entities = cmpOr(c.Entities, 1_000_000)
	return c
}

func cmpOr(v, d int) int {
	if v > 0 {
		return v
	}
	return d
}

// run is one measured pass.
type run struct {
	name            string
	events          int
	wall, cpu       time.Duration
	heapPerEntity   float64
	storePerEntity  float64
	entities        int
	hitRate         float64
	eventsPerSecond float64
}

// cpuPerEvent is CPU microseconds per event.
func (r run) cpuPerEvent() float64 { return float64(r.cpu.Nanoseconds()) / 1e3 / float64(r.events) }

func cpuTime() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

func heapNow() uint64 {
	runtime.GC()
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	return ms.HeapAlloc
}

// cacheFor scales the default 256 MiB record cache by entities/1M, as the
// benchmarks do, so the cache holds a similar share of the working set.
func cacheFor(entities int) int64 {
	return max(int64(float64(256<<20)*float64(entities)/1e6), 8<<20)
}

func runPipeline(name string, ev []workload.Payment, entities int, mode tallyward.Mode, dir string) (run, error) {
	opts := tallyward.Options{Dir: dir, Mode: mode, CacheBytes: cacheFor(entities)}
	if mode == tallyward.Settled {
		opts.MaxDisorder = 30 * time.Second
	}
	var rows int
	base := heapNow()
	p, err := tallyward.Open(workload.Spec(func(tallyward.Row[workload.Payment]) { rows++ }), opts)
	if err != nil {
		return run{}, err
	}
	c0, t0 := cpuTime(), time.Now()
	for _, e := range ev {
		if err := p.Process(e); err != nil {
			p.Close()
			return run{}, err
		}
	}
	if err := p.Flush(); err != nil {
		p.Close()
		return run{}, err
	}
	wall, cpu := time.Since(t0), cpuTime()-c0
	if err := p.Commit(nil); err != nil {
		p.Close()
		return run{}, err
	}
	st := p.Stats()
	h := heapNow()
	r := run{name: name, events: len(ev), wall: wall, cpu: cpu, entities: int(st.LiveEntities), hitRate: st.HitRate(),
		eventsPerSecond: float64(len(ev)) / wall.Seconds()}
	r.heapPerEntity = float64(h-min(base, h)) / float64(max(st.CachedKeys, 1))
	r.storePerEntity = float64(st.DiskBytes) / float64(max(st.LiveEntities, 1))
	if rows != len(ev) {
		err = fmt.Errorf("%s: %d rows for %d events", name, rows, len(ev))
	}
	return r, cmpErr(err, p.Close())
}

func cmpErr(a, b error) error {
	if a != nil {
		return a
	}
	return b
}

func runCeiling(ev []workload.Payment) run {
	base := heapNow()
	c := workload.NewCeiling()
	c0, t0 := cpuTime(), time.Now()
	for _, e := range ev {
		c.Event(e)
	}
	wall, cpu := time.Since(t0), cpuTime()-c0
	h := heapNow()
	r := run{name: "ceiling: exact in-memory map", events: len(ev), wall: wall, cpu: cpu, entities: c.Entities(),
		eventsPerSecond: float64(len(ev)) / wall.Seconds(), hitRate: math.NaN(), storePerEntity: math.NaN()}
	r.heapPerEntity = float64(h-min(base, h)) / float64(max(c.Entities(), 1))
	runtime.KeepAlive(c)
	return r
}

func runNaive(ev []workload.Payment, dir string) (run, error) {
	popts := store.PebbleOptions(store.Options{FS: vfs.Default, Logger: quietLog{}})
	n, err := workload.OpenNaive(dir, popts)
	popts.Cache.Unref()
	if err != nil {
		return run{}, err
	}
	c0, t0 := cpuTime(), time.Now()
	for _, e := range ev {
		if err := n.Event(e); err != nil {
			n.Close()
			return run{}, err
		}
	}
	wall, cpu := time.Since(t0), cpuTime()-c0
	seen := map[string]bool{}
	for _, e := range ev {
		seen["a"+e.Account], seen["d"+e.Device] = true, true
	}
	r := run{name: "naive: Pebble Get+decode+update+encode+Set per entity", events: len(ev), wall: wall, cpu: cpu, entities: len(seen),
		eventsPerSecond: float64(len(ev)) / wall.Seconds(), hitRate: math.NaN(), heapPerEntity: math.NaN(),
		storePerEntity: float64(n.DiskBytes()) / float64(len(seen))}
	return r, n.Close()
}

// Speed appends the speed tables and the events/s plot to r: the
// six-feature workload (package workload, the benchmarks' own) through a
// pipeline in memory and on disk, Eager and Settled, on Zipf(1.1) and
// uniform keys, beside the naive per-event Pebble store and the exact
// in-memory ceiling, all in this run; inline Score latency on cache hits
// and misses; bytes per entity.
func Speed(r *Report, c SpeedConfig) error {
	c = c.withDefaults()
	dir := c.Dir
	if dir == "" {
		d, err := os.MkdirTemp("", "tallyward-speed-")
		if err != nil {
			return err
		}
		defer os.RemoveAll(d)
		dir = d
	}
	sub := 0
	newDir := func() string {
		sub++
		return fmt.Sprintf("%s/%d", dir, sub)
	}
	t := &Table{
		Title: "Speed: six features over two entity kinds",
		Measures: fmt.Sprintf("%d events of the benchmark workload (package bench/workload: per account a 10 min count, 1 h sum, 24 h distinct devices, decayed mean, velocity; per device 1 h distinct accounts) over %d accounts and %d devices, one pass from an empty store, Flush included. "+
			"In memory: Options.Dir empty (Pebble on an in-memory filesystem); on disk: a directory. Cache %d MiB. The naive baseline runs %d events on disk, Pebble opened with exactly the store's settings (store.PebbleOptions); the ceiling keeps the same aggregates in a Go map and persists nothing. "+
			"Ratios are events/s over the baseline's events/s (wall) and the baseline's CPU per event over the run's (CPU); CPU is process CPU time, every goroutine included. The machine is shared, so the CPU ratios are the steadier figures. "+
			"Go heap per cached entity: heap growth after a GC over the records the cache holds (Pebble's block cache and memtables are outside the Go heap, except on the in-memory filesystem); store bytes: Pebble's size estimate over live entities.", c.Events, c.Entities, c.Entities, cacheFor(c.Entities)>>20, c.NaiveEvents),
		Header: []string{"keys", "run", "live entities", "events/s", "CPU us/event", "x naive (wall)", "x naive (CPU)", "x ceiling (wall)", "x ceiling (CPU)", "hit rate", "Go heap B/cached entity", "store B/entity"},
	}
	type point struct{ entities, eps float64 }
	plotPts := map[string][]point{}
	for _, uniform := range []bool{false, true} {
		keys := distName(!uniform)
		ev := workload.Generate(workload.Params{Accounts: c.Entities, Devices: c.Entities, Events: c.Events, Uniform: uniform})
		naive, err := runNaive(ev[:min(c.NaiveEvents, len(ev))], newDir())
		if err != nil {
			return err
		}
		ceil := runCeiling(ev)
		var runs []run
		for _, disk := range []bool{false, true} {
			for _, mode := range []tallyward.Mode{tallyward.Eager, tallyward.Settled} {
				where, d := "in memory", ""
				if disk {
					where, d = "on disk", newDir()
				}
				mname := map[tallyward.Mode]string{tallyward.Eager: "Eager", tallyward.Settled: "Settled"}[mode]
				rr, err := runPipeline(fmt.Sprintf("pipeline %s, %s", where, mname), ev, c.Entities, mode, d)
				if err != nil {
					return err
				}
				runs = append(runs, rr)
				if !uniform && disk && mode == tallyward.Eager {
					plotPts["pipeline on disk, Eager"] = append(plotPts["pipeline on disk, Eager"], point{float64(c.Entities), rr.eventsPerSecond})
				}
			}
		}
		if !uniform {
			plotPts["naive"] = append(plotPts["naive"], point{float64(c.Entities), naive.eventsPerSecond})
			plotPts["ceiling"] = append(plotPts["ceiling"], point{float64(c.Entities), ceil.eventsPerSecond})
		}
		for _, rr := range append(runs, naive, ceil) {
			t.add(keys, rr.name, rr.entities, rr.eventsPerSecond, rr.cpuPerEvent(),
				rr.eventsPerSecond/naive.eventsPerSecond, naive.cpuPerEvent()/rr.cpuPerEvent(),
				rr.eventsPerSecond/ceil.eventsPerSecond, ceil.cpuPerEvent()/rr.cpuPerEvent(), rr.hitRate, rr.heapPerEntity, rr.storePerEntity)
		}
		ev = nil
		runtime.GC()
	}
	r.Tables = append(r.Tables, t)

	// Events/s against entity count: Zipf keys, on disk, Eager.
	counts := []int{c.Entities / 10, c.Entities / 3}
	if c.Huge {
		counts = append(counts, 10*c.Entities)
	}
	for _, n := range counts {
		ev := workload.Generate(workload.Params{Accounts: n, Devices: n, Events: c.Events})
		rr, err := runPipeline("pipeline", ev, n, tallyward.Eager, newDir())
		if err != nil {
			return err
		}
		nv, err := runNaive(ev[:min(c.NaiveEvents, len(ev))], newDir())
		if err != nil {
			return err
		}
		ce := runCeiling(ev)
		plotPts["pipeline on disk, Eager"] = append(plotPts["pipeline on disk, Eager"], point{float64(n), rr.eventsPerSecond})
		plotPts["naive"] = append(plotPts["naive"], point{float64(n), nv.eventsPerSecond})
		plotPts["ceiling"] = append(plotPts["ceiling"], point{float64(n), ce.eventsPerSecond})
	}
	pl := plot.New()
	pl.Title.Text = fmt.Sprintf("Six-feature workload, Zipf(1.1) keys, %d events: events/s against entities", c.Events)
	pl.X.Label.Text = "accounts (and devices) keys drawn from"
	pl.Y.Label.Text = "events/s"
	pl.X.Scale, pl.Y.Scale = plot.LogScale{}, plot.LogScale{}
	pl.X.Tick.Marker, pl.Y.Tick.Marker = plot.LogTicks{Prec: -1}, plot.LogTicks{Prec: -1}
	for i, name := range []string{"ceiling", "pipeline on disk, Eager", "naive"} {
		pts := plotPts[name]
		slices.SortFunc(pts, func(a, b point) int { return int(a.entities - b.entities) })
		xy := make(plotter.XYs, len(pts))
		for j, p := range pts {
			xy[j] = plotter.XY{X: p.entities, Y: p.eps}
		}
		l, s, err := plotter.NewLinePoints(xy)
		if err != nil {
			return err
		}
		l.Color, s.Color = palette[i], palette[i]
		s.Shape = shapes[i]
		s.Radius = vg.Points(3)
		pl.Add(l, s)
		pl.Legend.Add(name, l, s)
	}
	pl.Legend.Top, pl.Legend.Left = false, true
	pl.Y.Min /= 4 // room for the legend under the lines
	r.Plots = append(r.Plots, &Figure{File: "speed.png", Caption: "events/s against entity count", Plot: pl})

	return latency(r, c, newDir())
}

// latency times every inline Score call of the second half of the
// workload on a store warmed by the first half, with a cache of a tenth
// of the default scale so that some entities seen before must be read
// back from Pebble. A call is a hit when the record cache answered for
// both entities, a miss when it had to look in the store for an entity
// it had seen before, and new when an entity was never seen.
func latency(r *Report, c SpeedConfig, dir string) error {
	ev := workload.Generate(workload.Params{Accounts: c.Entities, Devices: c.Entities, Events: c.Events})
	cache := cacheFor(c.Entities) / 10
	p, err := tallyward.Open(workload.Spec(nil), tallyward.Options{Dir: dir, CacheBytes: cache})
	if err != nil {
		return err
	}
	defer p.Close()
	half := len(ev) / 2
	seenA, seenD := map[string]bool{}, map[string]bool{}
	var out []float64
	for _, e := range ev[:half] {
		if out, err = p.Score(e, out[:0]); err != nil {
			return err
		}
		seenA[e.Account], seenD[e.Device] = true, true
	}
	var hit, miss, fresh []float64
	misses := p.Stats().CacheMisses
	for _, e := range ev[half:] {
		seen := seenA[e.Account] && seenD[e.Device]
		t0 := time.Now()
		out, err = p.Score(e, out[:0])
		d := float64(time.Since(t0).Nanoseconds()) / 1e3
		if err != nil {
			return err
		}
		m := p.Stats().CacheMisses
		switch {
		case !seen:
			fresh = append(fresh, d)
		case m != misses:
			miss = append(miss, d)
		default:
			hit = append(hit, d)
		}
		misses = m
		seenA[e.Account], seenD[e.Device] = true, true
	}
	t := &Table{
		Title: "Inline Score latency",
		Measures: fmt.Sprintf("Each Score call of the second half of the workload (%d calls; Zipf keys, %d accounts and devices, on disk, Eager, cache %d MiB so that records are evicted), timed alone, after the first half warmed the store. "+
			"Hit: both records in the cache. Miss: a record seen before was read back from Pebble. New: an entity never seen. Automatic commits (every 100k events) land on some calls.", len(ev)-half, c.Entities, cache>>20),
		Header: []string{"calls", "count", "p50 us", "p99 us", "p99.9 us", "max us"},
	}
	for _, g := range []struct {
		name string
		xs   []float64
	}{{"hit", hit}, {"miss", miss}, {"new", fresh}} {
		slices.Sort(g.xs)
		q := func(f float64) float64 {
			if len(g.xs) == 0 {
				return math.NaN()
			}
			return g.xs[min(int(f*float64(len(g.xs))), len(g.xs)-1)]
		}
		t.add(g.name, len(g.xs), q(0.5), q(0.99), q(0.999), q(1))
	}
	r.Tables = append(r.Tables, t)
	return nil
}

// quietLog drops Pebble's informational lines; errors still surface as
// returned errors.
type quietLog struct{}

func (quietLog) Infof(string, ...any)  {}
func (quietLog) Errorf(string, ...any) {}
func (quietLog) Fatalf(f string, a ...any) {
	panic(fmt.Sprintf(f, a...))
}
