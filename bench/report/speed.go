package report

import (
	"bufio"
	"fmt"
	"io"
	"math"
	"os"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"syscall"
	"time"

	"github.com/cockroachdb/pebble/v2/vfs"
	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/bench/workload"
	"github.com/tallyward/tallyward/internal/store"
)

// SpeedConfig sizes the speed report. Zero fields mean their defaults.
type SpeedConfig struct {
	// Entities is the number of live entities of the main scale, which
	// runs the whole matrix (in memory and on disk, Eager and Settled).
	// A scale of a tenth of it adds a point to the plot. Default 1M.
	Entities int
	// SkipHuge leaves out the scale of ten times Entities (on disk, Eager
	// and Settled). Default false.
	SkipHuge bool
	// Draws is the largest number of events of each drawn phase (Zipf,
	// uniform); a scale with fewer entities draws as many events as it
	// has entities. Default 500k.
	Draws int
	// NaiveEvents is how many events of each phase the naive baseline is
	// timed on (it runs several times slower than the pipeline): the
	// middle ones of the arrival phase, whose others are loaded in bulk,
	// untimed, before and after them, so that the baseline ends the phase
	// holding every entity; the first ones of each drawn phase.
	// Default 100k.
	NaiveEvents int
	// LatencyCalls is the number of calls of each drawn phase whose
	// inline latency is measured. Default 200k.
	LatencyCalls int
	// Dir holds the on-disk stores. Default: a new temporary directory.
	Dir string
	// Progress, when set, receives a line as each pass ends. Default nil.
	Progress io.Writer
	// Workers is Options.Workers of every pipeline. Default 0: the
	// pipeline's default.
	Workers int
}

func (c SpeedConfig) withDefaults() SpeedConfig {
	c.Entities = cmpOr(c.Entities, 1_000_000)
	c.Draws = cmpOr(c.Draws, 500_000)
	c.NaiveEvents = cmpOr(c.NaiveEvents, 100_000)
	c.LatencyCalls = cmpOr(c.LatencyCalls, 200_000)
	return c
}

func cmpOr(v, d int) int {
	if v > 0 {
		return v
	}
	return d
}

// The phases of a population (package workload), in stream order.
var (
	phases     = []string{"arrival (every event new)", "Zipf(1.1)", "uniform"}
	phaseShort = []string{"arrival", "Zipf", "uniform"}
)

func phaseEvents(pop *workload.Population) [][]workload.Payment {
	return [][]workload.Payment{pop.Arrive, pop.Zipf, pop.Uniform}
}

// phaseRun is one phase of one pass, measured.
type phaseRun struct {
	events       int
	wall, cpu    time.Duration
	mallocs      uint64
	hits, misses uint64
	hitKnown     bool
}

func (p phaseRun) eps() float64 { return float64(p.events) / p.wall.Seconds() }

// cpuPerEvent is CPU microseconds per event.
func (p phaseRun) cpuPerEvent() float64 {
	return float64(p.cpu.Nanoseconds()) / 1e3 / float64(p.events)
}

func (p phaseRun) hitRate() float64 {
	if !p.hitKnown || p.hits+p.misses == 0 {
		return math.NaN()
	}
	return float64(p.hits) / float64(p.hits+p.misses)
}

// pass is one run of the stream through a pipeline or a reference.
type pass struct {
	name     string
	scale    int
	phases   []phaseRun // one per phase, in stream order
	live     int64
	cached   int
	heapPer  float64 // Go heap bytes per cached record (or per entity)
	storePer float64 // store bytes per live entity
}

// meter measures a span of work: wall time, process CPU time (every
// goroutine, GC included) and allocations.
type meter struct {
	t0      time.Time
	c0      time.Duration
	mallocs uint64
}

func startMeter() meter {
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	return meter{t0: time.Now(), c0: cpuTime(), mallocs: ms.Mallocs}
}

func (m meter) stop(events int) phaseRun {
	wall, cpu := time.Since(m.t0), cpuTime()-m.c0
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	return phaseRun{events: events, wall: wall, cpu: cpu, mallocs: ms.Mallocs - m.mallocs}
}

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

func modeName(m tallyward.Mode) string {
	if m == tallyward.Settled {
		return "Settled"
	}
	return "Eager"
}

// pipelineOptions are the options of every measured pipeline: defaults
// (a 256 MiB record cache, automatic commits every 100k events) except
// the directory, the mode and a TTL longer than the stream, so that the
// live set at the end is the population.
func pipelineOptions(pop *workload.Population, dir string, mode tallyward.Mode, workers int) tallyward.Options {
	opts := tallyward.Options{Dir: dir, Mode: mode, TTL: pop.NoExpiry(), Workers: workers}
	if mode == tallyward.Settled {
		opts.MaxDisorder = 30 * time.Second
	}
	return opts
}

func runPipeline(pop *workload.Population, scale int, dir string, mode tallyward.Mode, workers int) (pass, error) {
	where := "in memory"
	if dir != "" {
		where = "on disk"
	}
	r := pass{name: fmt.Sprintf("pipeline %s, %s", where, modeName(mode)), scale: scale}
	var rows int
	base := heapNow()
	p, err := tallyward.Open(workload.Spec(func(tallyward.Row[workload.Payment]) { rows++ }), pipelineOptions(pop, dir, mode, workers))
	if err != nil {
		return r, err
	}
	total := 0
	for i, ev := range phaseEvents(pop) {
		s0 := p.Stats()
		m := startMeter()
		for _, e := range ev {
			if err := p.Process(e); err != nil {
				p.Close()
				return r, err
			}
		}
		if i == len(phases)-1 {
			if err := p.Flush(); err != nil {
				p.Close()
				return r, err
			}
		}
		ph := m.stop(len(ev))
		s1 := p.Stats()
		ph.hits, ph.misses, ph.hitKnown = s1.CacheHits-s0.CacheHits, s1.CacheMisses-s0.CacheMisses, true
		r.phases = append(r.phases, ph)
		total += len(ev)
	}
	// Land any commit in flight so that the heap holds records only.
	if err := p.Commit(nil); err != nil {
		p.Close()
		return r, err
	}
	st := p.Stats()
	h := heapNow()
	r.live, r.cached = st.LiveEntities, st.CachedKeys
	r.heapPer = float64(h-min(base, h)) / float64(max(st.CachedKeys, 1))
	r.storePer = float64(st.DiskBytes) / float64(max(st.LiveEntities, 1))
	if rows != total {
		err = fmt.Errorf("%s: %d rows for %d events", r.name, rows, total)
	}
	return r, cmpErr(err, p.Close())
}

func cmpErr(a, b error) error {
	if a != nil {
		return a
	}
	return b
}

// memAvailable is the kernel's estimate of memory available for new
// work, or 0 when the system does not say.
func memAvailable() uint64 {
	f, err := os.Open("/proc/meminfo")
	if err != nil {
		return 0
	}
	defer f.Close()
	s := bufio.NewScanner(f)
	for s.Scan() {
		if rest, ok := strings.CutPrefix(s.Text(), "MemAvailable:"); ok {
			kb, _ := strconv.ParseUint(strings.TrimSuffix(strings.TrimSpace(rest), " kB"), 10, 64)
			return kb << 10
		}
	}
	return 0
}

// ceilingBytesPerEntity is what the ceiling's maps were measured to hold
// per entity (about 1.9 KB for entities seen once, 2.0 KB at 1M entities
// with repeated events), rounded up.
const ceilingBytesPerEntity = 2500

func runCeiling(pop *workload.Population, scale int) pass {
	r := pass{name: "ceiling: exact in-memory map", scale: scale, live: int64(pop.Accounts + pop.Devices), storePer: math.NaN()}
	base := heapNow()
	c := workload.NewCeiling()
	for _, ev := range phaseEvents(pop) {
		m := startMeter()
		for _, e := range ev {
			c.Event(e)
		}
		r.phases = append(r.phases, m.stop(len(ev)))
	}
	h := heapNow()
	r.cached = c.Entities()
	r.heapPer = float64(h-min(base, h)) / float64(max(c.Entities(), 1))
	runtime.KeepAlive(c)
	return r
}

// runNaive times the baseline on n events of each phase: the middle of
// the arrival phase (the rest of it loaded in bulk around them, so that
// the store is timed at about its average size during the phase and the
// drawn phases meet a store holding every entity), the first n of each
// drawn phase.
func runNaive(pop *workload.Population, scale, n int, dir string) (pass, error) {
	r := pass{name: "naive: Pebble Get+decode+update+encode+Set per entity", scale: scale,
		live: int64(pop.Accounts + pop.Devices), heapPer: math.NaN()}
	popts := store.PebbleOptions(store.Options{FS: vfs.Default, Logger: quietLog{}})
	nv, err := workload.OpenNaive(dir, popts)
	popts.Cache.Unref()
	if err != nil {
		return r, err
	}
	for i, ev := range phaseEvents(pop) {
		k := min(n, len(ev))
		lo := 0
		if i == 0 {
			lo = (len(ev) - k) / 2
			if err := nv.LoadNew(ev[:lo]); err != nil {
				nv.Close()
				return r, err
			}
		}
		m := startMeter()
		for _, e := range ev[lo : lo+k] {
			if err := nv.Event(e); err != nil {
				nv.Close()
				return r, err
			}
		}
		r.phases = append(r.phases, m.stop(k))
		if i == 0 {
			if err := nv.LoadNew(ev[lo+k:]); err != nil {
				nv.Close()
				return r, err
			}
		}
	}
	r.storePer = float64(nv.DiskBytes()) / float64(r.live)
	return r, nv.Close()
}

// Speed appends the speed tables and the events/s plot to r: the
// six-feature workload (package workload, the benchmarks' own) over
// populations of a known number of live entities, through a pipeline in
// memory and on disk, Eager and Settled, beside the naive per-event Pebble
// store and the exact in-memory ceiling, all in this run; inline Score
// latency on cache hits and misses and during commits; bytes per entity.
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
		d := fmt.Sprintf("%s/%d", dir, sub)
		return d
	}
	type scale struct {
		entities int
		memory   bool // in-memory runs too
		settled  bool
	}
	scales := []scale{{c.Entities / 10, false, false}, {c.Entities, true, true}}
	if !c.SkipHuge {
		scales = append(scales, scale{10 * c.Entities, false, true})
	}
	var passes []pass
	var notes []string
	var lat *Table
	begin := time.Now()
	note := func(p pass) {
		if c.Progress == nil {
			return
		}
		var eps []string
		for i, ph := range p.phases {
			eps = append(eps, fmt.Sprintf("%s %.0f/s", phaseShort[i], ph.eps()))
		}
		fmt.Fprintf(c.Progress, "speed %v: %d entities, %s: %s\n", time.Since(begin).Round(time.Second), p.scale, p.name, strings.Join(eps, ", "))
	}
	for _, s := range scales {
		pop := workload.GeneratePopulation(workload.PopulationParams{Entities: s.entities, Draws: min(c.Draws, s.entities)})
		nv, err := runNaive(pop, s.entities, c.NaiveEvents, newDir())
		if err != nil {
			return err
		}
		os.RemoveAll(fmt.Sprintf("%s/%d", dir, sub))
		passes = append(passes, nv)
		note(nv)
		if need, have := uint64(ceilingBytesPerEntity*s.entities), memAvailable(); have == 0 || need < have/2 {
			passes = append(passes, runCeiling(pop, s.entities))
			note(passes[len(passes)-1])
		} else {
			notes = append(notes, fmt.Sprintf("The ceiling was not run at %d entities: its maps would need about %.1f GiB (%d B per entity) and the machine had %.1f GiB available.",
				s.entities, float64(need)/(1<<30), ceilingBytesPerEntity, float64(have)/(1<<30)))
		}
		runtime.GC()
		type cfg struct {
			disk bool
			mode tallyward.Mode
		}
		cfgs := []cfg{{true, tallyward.Eager}}
		if s.settled {
			cfgs = append(cfgs, cfg{true, tallyward.Settled})
		}
		if s.memory {
			cfgs = append(cfgs, cfg{false, tallyward.Eager}, cfg{false, tallyward.Settled})
		}
		for _, k := range cfgs {
			d := ""
			if k.disk {
				d = newDir()
			}
			pr, err := runPipeline(pop, s.entities, d, k.mode, c.Workers)
			if err != nil {
				return err
			}
			if d != "" {
				os.RemoveAll(d)
			}
			passes = append(passes, pr)
			note(pr)
			runtime.GC()
		}
		if s.entities == c.Entities {
			if lat, err = latency(c, pop, newDir()); err != nil {
				return err
			}
			if c.Progress != nil {
				fmt.Fprintf(c.Progress, "speed %v: latency done\n", time.Since(begin).Round(time.Second))
			}
		}
		pop = nil
		runtime.GC()
	}
	speedTables(r, c, passes, notes)
	r.Tables = append(r.Tables, lat)
	return speedPlot(r, passes)
}

func find(passes []pass, scale int, prefix string) *pass {
	for i := range passes {
		if passes[i].scale == scale && strings.HasPrefix(passes[i].name, prefix) {
			return &passes[i]
		}
	}
	return nil
}

func speedTables(r *Report, c SpeedConfig, passes []pass, notes []string) {
	t := &Table{
		Title: "Speed: six features over two entity kinds",
		Measures: "The workload of the benchmarks (package bench/workload: per account a 10 min count, 1 h sum, 24 h distinct devices, decayed mean, velocity; per device 1 h distinct accounts) " +
			"over a population of a known size: \"entities\" are the live records at the end, half accounts and half devices. Each pass streams three phases in time order: " +
			"arrival (one event per account, each meeting a new account and its new device, so every event creates two records), then Zipf(1.1) draws over those accounts, then uniform draws; " +
			"a drawn event pays from the account's own device nine times in ten, else from a device drawn the same way, so no record is created after arrival. " +
			fmt.Sprintf("The drawn phases have min(entities, %d) events each. ", c.Draws) +
			"The TTL is set longer than the stream's 7 simulated days, so no record expires and the pipeline, the baseline and the ceiling all end holding exactly the population. " +
			fmt.Sprintf("Workers: %d (0: the pipeline's default, one). ", c.Workers) +
			"Pipelines use the default options otherwise: a 256 MiB record cache (the 'cached' column of the next table says how many records it held), automatic commits every 100k events, Settled with MaxDisorder 30 s. " +
			"In memory: Options.Dir empty (Pebble on an in-memory filesystem); on disk: a directory. " +
			"The main scale runs all four; a tenth of it runs on disk, Eager only (a point for the plot); ten times it runs on disk, Eager and Settled (in memory the whole store would sit in the Go heap, and two more passes of that size would not fit the report's 15 minutes). " +
			"Hit rate: Stats.CacheHits over hits and misses during the phase, as the cache counts them (a lookup of a new entity counts as a miss). " +
			fmt.Sprintf("The naive baseline (Pebble opened with exactly the store's settings, store.PebbleOptions) is timed on %d events of each phase: the middle ones of the arrival phase, whose other events are loaded in bulk (untimed, without reads) before and after them, and the first ones of each drawn phase, which meet a store holding every entity. ", c.NaiveEvents) +
			"The ceiling keeps the same aggregates in Go maps and persists nothing. " +
			"Ratios: events/s over the baseline's (wall) and the baseline's CPU per event over the run's (CPU), phase by phase; CPU is process CPU time, every goroutine included, the steadier figure on a shared machine.",
		Header: []string{"entities", "phase", "run", "events timed", "events/s", "CPU us/event", "allocs/event", "x naive (wall)", "x naive (CPU)", "x ceiling (wall)", "x ceiling (CPU)", "cache hit rate"},
	}
	scales := []int{}
	for _, p := range passes {
		if !slices.Contains(scales, p.scale) {
			scales = append(scales, p.scale)
		}
	}
	for _, s := range scales {
		nv, ce := find(passes, s, "naive"), find(passes, s, "ceiling")
		for i, ph := range phases {
			for _, p := range passes {
				if p.scale != s {
					continue
				}
				x := p.phases[i]
				ratio := func(ref *pass, cpu bool) float64 {
					if ref == nil {
						return math.NaN()
					}
					y := ref.phases[i]
					if cpu {
						return y.cpuPerEvent() / x.cpuPerEvent()
					}
					return x.eps() / y.eps()
				}
				t.add(s, ph, p.name, x.events, x.eps(), x.cpuPerEvent(), float64(x.mallocs)/float64(x.events),
					ratio(nv, false), ratio(nv, true), ratio(ce, false), ratio(ce, true), x.hitRate())
			}
		}
	}
	r.Tables = append(r.Tables, t)

	m := &Table{
		Title: "Bytes per entity",
		Measures: "After each pass, with its last commit landed: live entities (records stored) and records the cache held; Go heap growth after a GC over the records held " +
			"(the ceiling: over its entities; Pebble's block cache and memtables are outside the Go heap, except on the in-memory filesystem where the store's files are in it); " +
			"Pebble's size estimate over live entities." + " " + strings.Join(notes, " "),
		Header: []string{"entities", "run", "live entities", "records cached", "Go heap B/cached record", "store B/live entity"},
	}
	for _, p := range passes {
		m.add(p.scale, p.name, p.live, p.cached, p.heapPer, p.storePer)
	}
	r.Tables = append(r.Tables, m)
}

// speedPlot draws events/s against live entities for the pipeline on
// disk (Eager) and both references, one line per drawn phase.
func speedPlot(r *Report, passes []pass) error {
	pl := plot.New()
	pl.Title.Text = "Six-feature workload: events/s against live entities"
	pl.X.Label.Text = "live entities (half accounts, half devices)"
	pl.Y.Label.Text = "events/s"
	pl.X.Scale, pl.Y.Scale = plot.LogScale{}, plot.LogScale{}
	pl.X.Tick.Marker, pl.Y.Tick.Marker = plot.LogTicks{Prec: -1}, plot.LogTicks{Prec: -1}
	for i, run := range []string{"ceiling", "pipeline on disk, Eager", "naive"} {
		for j, ph := range []int{1, 2} {
			var xy plotter.XYs
			for _, p := range passes {
				if strings.HasPrefix(p.name, run) {
					xy = append(xy, plotter.XY{X: float64(p.scale), Y: p.phases[ph].eps()})
				}
			}
			if len(xy) == 0 {
				continue
			}
			slices.SortFunc(xy, func(a, b plotter.XY) int { return int(a.X - b.X) })
			l, s, err := plotter.NewLinePoints(xy)
			if err != nil {
				return err
			}
			l.Color, s.Color = palette[i], palette[i]
			s.Shape = shapes[i]
			s.Radius = vg.Points(3)
			if j == 1 {
				l.Dashes = []vg.Length{vg.Points(4), vg.Points(3)}
				s.Shape = draw.PyramidGlyph{}
			}
			pl.Add(l, s)
			pl.Legend.Add(run+", "+phases[ph], l, s)
		}
	}
	pl.Legend.Top, pl.Legend.Left = false, true
	pl.Y.Min /= 8 // room for the legend under the lines
	r.Plots = append(r.Plots, &Figure{File: "speed.png", Caption: "events/s against live entities", Plot: pl, Width: 8, Height: 5})
	return nil
}

// latency times inline Score calls on disk, Eager, at the main scale:
// the arrival phase (every call meets two new entities) and the first
// LatencyCalls calls of each drawn phase, each call timed alone. A call is
// a hit when the record cache answered for both entities and a miss when
// a record was read back from Pebble. Calls are also classed by commit:
// the call that cut an automatic commit, and the calls made while the
// commit was written in the background.
func latency(c SpeedConfig, pop *workload.Population, dir string) (*Table, error) {
	p, err := tallyward.Open(workload.Spec(nil), pipelineOptions(pop, dir, tallyward.Eager, c.Workers))
	if err != nil {
		return nil, err
	}
	defer p.Close()
	const commitEvery = 100_000 // the default
	classes := map[string][]float64{}
	const afterCut = time.Second
	order := []string{"new (arrival)", "hit (Zipf)", "miss (Zipf)", "hit (uniform)", "miss (uniform)", "cut a commit", "within 1 s after a cut", "other", "all"}
	type worst struct {
		us    float64
		class string
		n     int
	}
	var w worst
	var out []float64
	st := p.Stats()
	n := 0
	var cut time.Time
	var shift, last int64 // the times of events left out are skipped, so the stream stays dense
	for i, ev := range phaseEvents(pop) {
		if i > 0 {
			ev = ev[:min(len(ev), c.LatencyCalls)]
			shift += ev[0].T - last
		}
		for _, e := range ev {
			e.T -= shift
			last = e.T + shift
			t0 := time.Now()
			out, err = p.Score(e, out[:0])
			d := float64(time.Since(t0).Nanoseconds()) / 1e3
			if err != nil {
				return nil, err
			}
			n++
			s := p.Stats()
			var class string
			switch {
			case i == 0:
				class = "new (arrival)"
			case s.CacheMisses != st.CacheMisses:
				class = "miss (" + phaseShort[i] + ")"
			default:
				class = "hit (" + phaseShort[i] + ")"
			}
			classes[class] = append(classes[class], d)
			commit := "other"
			switch {
			case s.Events%commitEvery == 0:
				cut = t0
				commit = "cut a commit"
			case t0.Sub(cut) < afterCut:
				commit = "within 1 s after a cut"
			}
			classes[commit] = append(classes[commit], d)
			classes["all"] = append(classes["all"], d)
			if d > w.us {
				w = worst{d, class + ", " + commit, n}
			}
			st = s
		}
	}
	t := &Table{
		Title: "Inline Score latency",
		Measures: fmt.Sprintf("Score calls on disk, Eager, %d live entities at the end, default options (256 MiB record cache, automatic commits every %d events written in the background) and the TTL of the speed table: "+
			"every call of the arrival phase and the first %d calls of each drawn phase, each timed alone. Hit: both records in the cache; miss: a record read back from Pebble; new: both entities new. "+
			"The same calls are classed again by commit: the call that cut an automatic commit (it runs the expiry sweep and takes the dirty records; a goroutine then encodes and writes them), the calls that started within 1 s after it (a window meant to cover that background write; the pipeline does not say when it lands), and the rest. "+
			"The longest call was call %d (%s): %.0f us.", c.Entities, commitEvery, c.LatencyCalls, w.n, w.class, w.us),
		Header: []string{"calls", "count", "p50 us", "p99 us", "p99.9 us", "max us"},
	}
	for _, k := range order {
		xs := classes[k]
		slices.Sort(xs)
		q := func(f float64) float64 {
			if len(xs) == 0 {
				return math.NaN()
			}
			return xs[min(int(f*float64(len(xs))), len(xs)-1)]
		}
		t.add(k, len(xs), q(0.5), q(0.99), q(0.999), q(1))
	}
	return t, nil
}

// quietLog drops Pebble's informational lines; errors still surface as
// returned errors.
type quietLog struct{}

func (quietLog) Infof(string, ...any)  {}
func (quietLog) Errorf(string, ...any) {}
func (quietLog) Fatalf(f string, a ...any) {
	panic(fmt.Sprintf(f, a...))
}
