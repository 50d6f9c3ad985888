package report

import (
	"cmp"
	"fmt"
	"image/color"
	"math"
	"math/rand/v2"
	"slices"
	"sort"
	"time"

	"github.com/axiomhq/hyperloglog"
	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"

	"github.com/tallyward/tallyward/sketch"
	"github.com/tallyward/tallyward/window"
)

// Config sizes an accuracy run. The zero value is the full run.
type Config struct {
	// Quick shrinks every stream so the whole accuracy report takes
	// seconds: cardinalities to 1M, streams of 200k events. Default false.
	Quick bool
	// Seed seeds every generated stream (math/rand/v2 PCG). Default 1.
	Seed uint64
	// MaxCardinality is the largest true cardinality of the distinct
	// sweep. Default 10M (1M when Quick).
	MaxCardinality int
}

func (c Config) seed() uint64 {
	if c.Seed == 0 {
		return 1
	}
	return c.Seed
}

func (c Config) maxCard() int {
	switch {
	case c.MaxCardinality > 0:
		return c.MaxCardinality
	case c.Quick:
		return 1_000_000
	}
	return 10_000_000
}

// streamLen is the length of the Count-Min, Space-Saving and quantile
// streams.
func (c Config) streamLen() int {
	if c.Quick {
		return 200_000
	}
	return 2_000_000
}

func (c Config) rng(stream uint64) *rand.Rand {
	return rand.New(rand.NewPCG(c.seed(), stream))
}

// Citations used by several tables.
const (
	srcHLL = "Flajolet, Fusy, Gandouet, Meunier (2007), \"HyperLogLog: the analysis of a near-optimal cardinality estimation algorithm\", AofA: relative standard error 1.04/sqrt(m), m = 2^p registers."
	srcCM  = "Cormode, Muthukrishnan (2005), \"An improved data stream summary: the count-min sketch and its applications\", J. Algorithms 55(1): with width ceil(e/epsilon) and depth ceil(ln(1/delta)), estimate >= true count, and estimate <= true + epsilon*N with probability >= 1-delta per query."
	srcSS  = "Metwally, Agrawal, El Abbadi (2005), \"Efficient computation of frequent and top-k elements in data streams\", ICDT: with m counters, Count-Err <= f <= Count for every monitored item, Err <= N/m, and every item with f > N/m is monitored."
	srcDD  = "Masson, Rim, Lee (2019), \"DDSketch: a fast and fully-mergeable quantile sketch with relative-error guarantees\", PVLDB 12(12): every quantile estimate within alpha relative error of the exact value of its rank (no bucket collapsed)."
)

// t0 is the start of the generated streams: a Unix-epoch-aligned day, so
// every window lies on pane boundaries the same way in each run.
var t0 = (int64(1_780_000_000) * int64(time.Second) / int64(24*time.Hour)) * int64(24*time.Hour)

// Accuracy runs every summary of package sketch and the sliding count of
// package window against exact references on seeded streams and returns
// the report (plots included, not yet written).
func Accuracy(cfg Config) (*Report, error) {
	r := &Report{Title: "tallyward accuracy report"}
	mode := "full"
	if cfg.Quick {
		mode = "quick"
	}
	r.Notes = append(r.Notes, fmt.Sprintf("Mode %s, seed %d, distinct sweep to %d items, streams of %d events. "+
		"Every figure is a function of the seed: rerun with the same flags to get the same page.", mode, cfg.seed(), cfg.maxCard(), cfg.streamLen()))
	steps := []func(*Report, Config) error{distinctSweep, windowedDistinct, countMinTable, spaceSavingTable, quantileTable, slidingCountTable}
	for _, s := range steps {
		if err := s(r, cfg); err != nil {
			return nil, err
		}
	}
	return r, nil
}

// checkpoints returns about ten log-spaced cardinalities per decade from
// 1 to max, max included.
func checkpoints(max int) []int {
	var out []int
	for e := 0.0; ; e += 0.1 {
		n := int(math.Round(math.Pow(10, e)))
		if n > max {
			break
		}
		if len(out) == 0 || n > out[len(out)-1] {
			out = append(out, n)
		}
	}
	if out[len(out)-1] != max {
		out = append(out, max)
	}
	return out
}

// decade names the bucket [10^k, 10^(k+1)) holding n; the top bucket
// includes its upper end.
func decade(n, max int) int {
	d := int(math.Floor(math.Log10(float64(n)) + 1e-9))
	if top := int(math.Floor(math.Log10(float64(max)) + 1e-9)); d >= top && top > 0 {
		d = top - 1
	}
	return d
}

type distinctImpl int

const (
	implDistinct distinctImpl = iota
	implEver
	implLibrary
	nImpl
)

var implNames = [nImpl]string{"sketch.Distinct (sliding registers)", "sketch.DistinctEver", "axiomhq/hyperloglog v0.3.0"}

// distinctSweep: relative error of the three distinct counts against the
// true cardinality, per precision and decade, with plots and sizes.
func distinctSweep(r *Report, cfg Config) error {
	precisions := []uint8{10, 12, 14}
	// Many independent streams for small cardinalities, a few for the
	// largest: stream tr runs to limit(tr). Checkpoints of one stream are
	// correlated, so a row's statistics rest on its number of streams.
	maxN := cfg.maxCard()
	trials := 48
	limit := func(tr int) int {
		switch {
		case tr < 3:
			return maxN
		case tr < 12:
			return min(maxN, 1_000_000)
		}
		return min(maxN, 100_000)
	}
	cps := checkpoints(maxN)
	type key struct {
		p    uint8
		impl distinctImpl
		dec  int
	}
	errs := map[key][]float64{}
	streams := map[key]map[int]bool{}
	type point struct{ n, err float64 }
	pts := map[uint8]*[nImpl][]point{}
	type sizeKey struct {
		p    uint8
		impl distinctImpl
		n    int
	}
	sizes := map[sizeKey][2]int{}
	sizeAt := map[int]bool{10: true, 1000: true, 100_000: true, 1_000_000: true, 10_000_000: true, maxN: true}
	for pi, p := range precisions {
		pts[p] = &[nImpl][]point{}
		for tr := range trials {
			rng := cfg.rng(uint64(100*pi + tr))
			d, err := sketch.NewDistinct(sketch.DistinctSpec{Window: 24 * time.Hour, Resolution: 24 * time.Hour, Precision: p})
			if err != nil {
				return err
			}
			ev, err := sketch.NewDistinctEver(sketch.DistinctEverSpec{Precision: p})
			if err != nil {
				return err
			}
			lib, err := hyperloglog.NewSketch(p, true)
			if err != nil {
				return err
			}
			next := 0
			for i := 1; i <= limit(tr); i++ {
				h := rng.Uint64()
				t := t0 + int64(i)
				d.Add(t, h)
				ev.Add(t, h)
				lib.InsertHash(h)
				if i != cps[next] {
					continue
				}
				next++
				est := [nImpl]float64{float64(d.DistinctAt(t)), float64(ev.DistinctAt(t)), float64(lib.Estimate())}
				for im, e := range est {
					re := (e - float64(i)) / float64(i)
					k := key{p, distinctImpl(im), decade(i, maxN)}
					errs[k] = append(errs[k], math.Abs(re))
					if streams[k] == nil {
						streams[k] = map[int]bool{}
					}
					streams[k][tr] = true
					if tr < 8 { // enough points to see the spread; statistics use every stream
						pts[p][im] = append(pts[p][im], point{float64(i), re})
					}
				}
				if tr == 0 && sizeAt[i] {
					b1, _ := d.AppendBinary(nil)
					b2, _ := ev.AppendBinary(nil)
					b3, _ := lib.MarshalBinary()
					sizes[sizeKey{p, implDistinct, i}] = [2]int{d.SizeBytes(), len(b1)}
					sizes[sizeKey{p, implEver, i}] = [2]int{ev.SizeBytes(), len(b2)}
					sizes[sizeKey{p, implLibrary, i}] = [2]int{-1, len(b3)}
				}
			}
		}
	}
	t := &Table{
		Title:    "Distinct count: relative error against true cardinality",
		Measures: fmt.Sprintf("|estimate - n| / n for n from 1 to %d (about ten log-spaced checkpoints per decade, up to %d seeded streams of distinct random 64-bit items per precision; 'streams' says how many reach each decade), grouped by decade of n. sketch.Distinct is asked with a window holding every item (exact up to 128 items, then sliding registers); sketch.DistinctEver and axiomhq/hyperloglog are sparse, then dense, at the same precision.", maxN, trials),
		Bound:    "relative standard error sigma = 1.04/sqrt(2^p), the root mean square of the relative error; checked: the RMS of the decade's errors <= sigma * (1 + 3/sqrt(2k)) for k independent streams (sampling slack). The largest error is shown, not checked: the analysis bounds the spread, not the worst case.",
		Source:   srcHLL,
		Header:   []string{"p", "summary", "n", "streams", "mean", "p50", "p99", "max", "rms", "sigma", "allowed rms", "inside"},
		Checked:  true,
	}
	for _, p := range precisions {
		sigma := 1.04 / math.Sqrt(float64(uint64(1)<<p))
		for im := range nImpl {
			for dec := 0; dec <= decade(maxN, maxN); dec++ {
				xs := errs[key{p, im, dec}]
				if len(xs) == 0 {
					continue
				}
				s := summarize(xs)
				hi := math.Pow(10, float64(dec+1))
				span := fmt.Sprintf("%s-%s", count(math.Pow(10, float64(dec))), count(min(hi, float64(maxN))))
				ns := len(streams[key{p, im, dec}])
				rm, allowed := rms(xs), allowedRMS(sigma, ns)
				ok := rm <= allowed
				t.check(ok, "p=%d %s n=%s: rms %.4f against sigma %.4f (allowed %.4f, %d streams)", p, implNames[im], span, rm, sigma, allowed, ns)
				t.add(int(p), implNames[im], span, ns, s.Mean, s.P50, s.P99, s.Max, rm, sigma, allowed, ok)
			}
		}
	}
	r.Tables = append(r.Tables, t)

	for _, p := range precisions {
		sigma := 1.04 / math.Sqrt(float64(uint64(1)<<p))
		pl := plot.New()
		pl.Title.Text = fmt.Sprintf("Distinct count, p=%d: relative error against true cardinality", p)
		pl.X.Label.Text = "true cardinality"
		pl.Y.Label.Text = "(estimate - n) / n"
		pl.X.Scale = plot.LogScale{}
		pl.X.Tick.Marker = plot.LogTicks{Prec: -1}
		band(pl, 1, float64(maxN), sigma, "±1.04/sqrt(m)")
		for im := range nImpl {
			xy := make(plotter.XYs, len(pts[p][im]))
			for i, q := range pts[p][im] {
				xy[i] = plotter.XY{X: q.n, Y: q.err}
			}
			s, err := plotter.NewScatter(xy)
			if err != nil {
				return err
			}
			s.GlyphStyle.Color = palette[im]
			s.GlyphStyle.Radius = vg.Points(1.5)
			s.GlyphStyle.Shape = shapes[im]
			pl.Add(s)
			pl.Legend.Add(implNames[im], s)
		}
		pl.Legend.Top = true
		pl.Y.Min, pl.Y.Max = -6*sigma, 6*sigma
		r.Plots = append(r.Plots, &Figure{File: fmt.Sprintf("distinct-p%d.png", p), Caption: fmt.Sprintf("distinct count error against cardinality, p=%d", p), Plot: pl})
	}

	st := &Table{
		Title:    "Bytes per distinct summary",
		Measures: "SizeBytes (approximate heap) and the length of the binary encoding after n distinct items (first stream of each precision). axiomhq/hyperloglog reports no heap size; its encoding is its MarshalBinary.",
		Header:   []string{"p", "summary", "n", "heap bytes", "encoded bytes"},
	}
	var ns []int
	for n := range sizeAt {
		if n <= maxN {
			ns = append(ns, n)
		}
	}
	slices.Sort(ns)
	for _, p := range precisions {
		for im := range nImpl {
			for _, n := range ns {
				s, ok := sizes[sizeKey{p, im, n}]
				if !ok {
					continue
				}
				heap := "-"
				if s[0] >= 0 {
					heap = fmt.Sprint(s[0])
				}
				st.add(int(p), implNames[im], count(float64(n)), heap, s[1])
			}
		}
	}
	r.Tables = append(r.Tables, st)
	return nil
}

// count prints 1, 10, 1k, 10k, 1M ...
func count(v float64) string {
	switch {
	case v >= 1e6:
		return fmt.Sprintf("%gM", v/1e6)
	case v >= 1e3:
		return fmt.Sprintf("%gk", v/1e3)
	}
	return fmt.Sprintf("%g", v)
}

var (
	palette = []color.Color{
		color.RGBA{R: 0x1f, G: 0x77, B: 0xb4, A: 0xff},
		color.RGBA{R: 0xd6, G: 0x27, B: 0x28, A: 0xff},
		color.RGBA{R: 0x2c, G: 0xa0, B: 0x2c, A: 0xff},
		color.RGBA{R: 0x94, G: 0x67, B: 0xbd, A: 0xff},
		color.RGBA{R: 0xff, G: 0x7f, B: 0x0e, A: 0xff},
		color.RGBA{R: 0x8c, G: 0x56, B: 0x4b, A: 0xff},
	}
	shapes = []draw.GlyphDrawer{draw.CircleGlyph{}, draw.TriangleGlyph{}, draw.SquareGlyph{}}
)

// band draws dashed horizontal lines at ±sigma across [x0, x1].
func band(pl *plot.Plot, x0, x1, sigma float64, label string) {
	for i, y := range []float64{sigma, -sigma} {
		l, err := plotter.NewLine(plotter.XYs{{X: x0, Y: y}, {X: x1, Y: y}})
		if err != nil {
			continue
		}
		l.Color = color.Gray{Y: 0x60}
		l.Dashes = []vg.Length{vg.Points(4), vg.Points(3)}
		pl.Add(l)
		if i == 0 {
			pl.Legend.Add(label, l)
		}
	}
}

// windowedDistinct: sketch.Distinct over a 1 h window of 1 min panes
// against an exact sliding set, asked once a minute over a stream whose
// active population rises and falls.
func windowedDistinct(r *Report, cfg Config) error {
	const p = 12
	win, res := time.Hour, time.Minute
	hours := 12
	step := 50 * time.Millisecond
	if cfg.Quick {
		hours, step = 4, 100*time.Millisecond
	}
	d, err := sketch.NewDistinct(sketch.DistinctSpec{Window: win, Resolution: res, Precision: p})
	if err != nil {
		return err
	}
	rng := cfg.rng(200)
	last := map[uint64]int64{}
	end := t0 + int64(hours)*int64(time.Hour)
	nextQ := t0 + int64(res) + int64(res)/2
	var sketchErr, edgeShare []float64
	var xyErr, xyEdge plotter.XYs
	maxEdgeOK := true
	for t := t0; t < end; t += int64(step) {
		// Population between 2k and 120k items over a 6 h cycle.
		phase := float64(t-t0) / float64(6*time.Hour) * 2 * math.Pi
		pop := 2000 + int(59000*(1-math.Cos(phase)))
		id := uint64(rng.IntN(pop))
		h := sketch.Hash(fmt.Appendf(nil, "item-%d", id))
		d.Add(t, h)
		last[h] = t
		for nextQ <= t+int64(step) && nextQ < end {
			// Query just before the next event: every event <= nextQ is in.
			q := nextQ
			nextQ += int64(res)
			if q < t {
				continue
			}
			est := float64(d.DistinctAt(q))
			paneStart := q - ((q%int64(res))+int64(res))%int64(res)
			from := paneStart - int64(win) + int64(res) // the pane rule's first counted ns
			var inPanes, inExact int
			for _, lt := range last {
				if lt >= from && lt <= q {
					inPanes++
				}
				if lt > q-int64(win) && lt <= q {
					inExact++
				}
			}
			hour := float64(q-t0) / float64(time.Hour)
			if inPanes > 0 {
				e := (est - float64(inPanes)) / float64(inPanes)
				if inPanes > 128 {
					sketchErr = append(sketchErr, math.Abs(e))
				}
				xyErr = append(xyErr, plotter.XY{X: hour, Y: e})
			}
			if inExact > 0 {
				share := float64(inExact-inPanes) / float64(inExact)
				edgeShare = append(edgeShare, share)
				xyEdge = append(xyEdge, plotter.XY{X: hour, Y: -share})
			}
			if inPanes > inExact {
				maxEdgeOK = false
			}
		}
	}
	sigma := 1.04 / math.Sqrt(float64(uint64(1)<<p))
	s := summarize(sketchErr)
	e := summarize(edgeShare)
	t := &Table{
		Title: "Windowed distinct over time: sketch.Distinct against an exact sliding set",
		Measures: fmt.Sprintf("A %d h stream, one event every %v, items drawn from an active population cycling between 2k and 120k; a %v window of %v panes at p=%d, asked once a minute at mid-pane. "+
			"Sketch error: |estimate - exact| / exact, exact = the distinct items in the panes the window rule counts (queries above the 128-item exact limit). "+
			"Trailing edge: the share of the exact (t-W, t] set that the pane rule leaves out.", hours, step, win, res, p),
		Bound:   "sketch error: standard error sigma = 1.04/sqrt(2^p), checked: RMS <= sigma * (1 + 3/sqrt(2k)), k = the number of disjoint windows (hours) the queries span; trailing edge: the pane rule never counts more than the exact window and leaves out less than one pane (the package's stated rule).",
		Source:  srcHLL,
		Header:  []string{"figure", "queries", "mean", "p50", "p99", "max", "rms", "bound", "inside"},
		Checked: true,
	}
	rm, allowed := rms(sketchErr), allowedRMS(sigma, hours)
	ok := rm <= allowed
	t.check(ok, "sketch error rms %.4f against sigma %.4f (allowed %.4f)", rm, sigma, allowed)
	t.add("sketch error (relative)", s.N, s.Mean, s.P50, s.P99, s.Max, rm, fmt.Sprintf("sigma %.4f, rms <= %.4f", sigma, allowed), ok)
	t.check(maxEdgeOK, "the pane rule counted an item outside the exact window")
	t.add("trailing edge left out (share of exact)", e.N, e.Mean, e.P50, e.P99, e.Max, "-", fmt.Sprintf("< one pane (%.4f of the window)", float64(res)/float64(win)), maxEdgeOK)
	r.Tables = append(r.Tables, t)

	pl := plot.New()
	pl.Title.Text = fmt.Sprintf("Windowed distinct (%v window, %v panes, p=%d) over time", win, res, p)
	pl.X.Label.Text = "hours"
	pl.Y.Label.Text = "relative error"
	band(pl, 0, float64(hours), sigma, "±1.04/sqrt(m)")
	l1, err := plotter.NewLine(xyErr)
	if err != nil {
		return err
	}
	l1.Color = palette[0]
	pl.Add(l1)
	pl.Legend.Add("sketch against the pane rule's exact set", l1)
	l2, err := plotter.NewLine(xyEdge)
	if err != nil {
		return err
	}
	l2.Color = palette[1]
	pl.Add(l2)
	pl.Legend.Add("pane rule against exact (t-W, t] (trailing edge)", l2)
	pl.Legend.Left = true
	pl.Y.Min = min(pl.Y.Min, -6*sigma) // room for the legend below the curves
	r.Plots = append(r.Plots, &Figure{File: "windowed-distinct.png", Caption: "windowed distinct error against time", Plot: pl})
	return nil
}

// keyStream draws n item ids, Zipf(1.1) or uniform over universe.
func keyStream(rng *rand.Rand, n, universe int, zipf bool) []uint64 {
	out := make([]uint64, n)
	z := rand.NewZipf(rng, 1.1, 1, uint64(universe-1))
	for i := range out {
		if zipf {
			out[i] = z.Uint64()
		} else {
			out[i] = uint64(rng.IntN(universe))
		}
	}
	return out
}

func itemHash(id uint64) uint64 {
	var b [8]byte
	for i := range b {
		b[i] = byte(id >> (8 * i))
	}
	return sketch.Hash(b[:])
}

func countMinTable(r *Report, cfg Config) error {
	n := cfg.streamLen()
	universe := n / 10
	t := newCountMinTable(fmt.Sprintf("Streams of N=%d items over a universe of %d (Zipf(1.1) and uniform); every item of the universe is queried (unseen ones too).", n, universe))
	for si, zipf := range []bool{true, false} {
		ids := keyStream(cfg.rng(uint64(300+si)), n, universe, zipf)
		hs := make([]uint64, len(ids))
		for i, id := range ids {
			hs[i] = itemHash(id)
		}
		var unseen []uint64
		seen := make([]bool, universe)
		for _, id := range ids {
			seen[id] = true
		}
		for id, ok := range seen {
			if !ok {
				unseen = append(unseen, itemHash(uint64(id)))
			}
		}
		for _, eps := range []float64{0.01, 0.001} {
			if err := measureCountMin(t, distName(zipf), hs, unseen, eps, 0.01); err != nil {
				return err
			}
		}
	}
	r.Tables = append(r.Tables, t)
	return nil
}

func distName(zipf bool) string {
	if zipf {
		return "Zipf(1.1)"
	}
	return "uniform"
}

func newCountMinTable(measures string) *Table {
	return &Table{
		Title:    "Count-Min: overestimate against epsilon*N",
		Measures: measures + " Overestimate = estimate - true count, shown as a multiple of epsilon*N; 'beyond' is the share of queries whose overestimate exceeds epsilon*N.",
		Bound:    "estimate >= true always; estimate - true <= epsilon*N for at least a share 1-delta of queries; checked: no underestimate and share beyond <= delta.",
		Source:   srcCM,
		Header:   []string{"items", "epsilon", "width x depth", "queries", "mean over/(eps N)", "p99 over/(eps N)", "max over/(eps N)", "beyond eps N", "delta", "under", "bytes", "inside"},
		Checked:  true,
	}
}

// measureCountMin adds the stream hs to a Count-Min sketch and queries
// every distinct item of hs and every item of extra (known absent).
func measureCountMin(t *Table, name string, hs, extra []uint64, eps, delta float64) error {
	cm, err := sketch.NewCountMin(sketch.CountMinParams{Epsilon: eps, Delta: delta})
	if err != nil {
		return err
	}
	exact := map[uint64]uint64{}
	for _, h := range hs {
		cm.Add(h, 1)
		exact[h]++
	}
	for _, h := range extra {
		exact[h] += 0
	}
	bound := cm.ErrorBound()
	var over []float64
	beyond, under := 0, 0
	for h, f := range exact {
		est := cm.Estimate(h)
		if est < f {
			under++
			continue
		}
		o := float64(est - f)
		over = append(over, o/bound)
		if o > bound {
			beyond++
		}
	}
	s := summarize(over)
	share := float64(beyond) / float64(len(exact))
	ok := under == 0 && share <= delta
	t.check(ok, "%s eps=%g: share beyond %.4f, %d underestimates", name, eps, share, under)
	w, dp := cm.Params().Dims()
	enc, err := cm.AppendBinary(nil)
	if err != nil {
		return err
	}
	t.add(name, eps, fmt.Sprintf("%d x %d", w, dp), len(exact), s.Mean, s.P99, s.Max, share, delta, under, fmt.Sprintf("%d heap, %d encoded", cm.SizeBytes(), len(enc)), ok)
	return nil
}

func spaceSavingTable(r *Report, cfg Config) error {
	n := cfg.streamLen()
	universe := n / 10
	t := newSpaceSavingTable(fmt.Sprintf("Streams of N=%d items over %d (Zipf(1.1) and uniform).", n, universe))
	for si, zipf := range []bool{true, false} {
		ids := keyStream(cfg.rng(uint64(400+si)), n, universe, zipf)
		hs := make([]uint64, len(ids))
		for i, id := range ids {
			hs[i] = itemHash(id)
		}
		for _, m := range []int{32, 256} {
			if err := measureSpaceSaving(t, distName(zipf), hs, m); err != nil {
				return err
			}
		}
	}
	r.Tables = append(r.Tables, t)
	return nil
}

func newSpaceSavingTable(measures string) *Table {
	return &Table{
		Title:    "Space-Saving: top-k recall and count error",
		Measures: measures + " Recall: the share of the true top 10 (ties broken by smaller hash) found in Top(10). Guaranteed: the items with f > N/m, all of which must be monitored. Count error: Count - f over monitored items, as a share of N/m.",
		Bound:    "Count-Err <= f <= Count per monitored item, Err <= N/m, every item with f > N/m monitored; checked: all three.",
		Source:   srcSS,
		Header:   []string{"items", "m", "top-10 recall", "f > N/m", "monitored of those", "max (Count-f)/(N/m)", "max Err/(N/m)", "per-counter bounds", "bytes", "inside"},
		Checked:  true,
	}
}

func measureSpaceSaving(t *Table, name string, hs []uint64, m int) error {
	tk, err := sketch.NewTopK(sketch.TopKParams{Capacity: m})
	if err != nil {
		return err
	}
	exact := map[uint64]uint64{}
	for _, h := range hs {
		tk.Add(h, 1)
		exact[h]++
	}
	order := make([]uint64, 0, len(exact))
	for h := range exact {
		order = append(order, h)
	}
	slices.SortFunc(order, func(a, b uint64) int {
		if c := cmp.Compare(exact[b], exact[a]); c != 0 {
			return c
		}
		return cmp.Compare(a, b)
	})
	nm := float64(len(hs)) / float64(m)
	found := map[uint64]bool{}
	for _, c := range tk.Top(nil, 10) {
		found[c.Hash] = true
	}
	recall := 0
	for _, h := range order[:min(10, len(order))] {
		if found[h] {
			recall++
		}
	}
	heavy, heavyMon := 0, 0
	for h, f := range exact {
		if float64(f) > nm {
			heavy++
			if _, ok := tk.Estimate(h); ok {
				heavyMon++
			}
		}
	}
	boundsOK := true
	var maxCount, maxErr float64
	for _, c := range tk.Top(nil, m) {
		f := exact[c.Hash]
		if c.Count < f || c.Count-c.Err > f || float64(c.Err) > nm {
			boundsOK = false
		}
		maxCount = max(maxCount, float64(c.Count-f)/nm)
		maxErr = max(maxErr, float64(c.Err)/nm)
	}
	ok := boundsOK && heavy == heavyMon
	t.check(ok, "%s m=%d: %d of %d heavy items monitored, per-counter bounds %v", name, m, heavyMon, heavy, boundsOK)
	enc, err := tk.AppendBinary(nil)
	if err != nil {
		return err
	}
	t.add(name, m, fmt.Sprintf("%d/%d", recall, min(10, len(order))), heavy, heavyMon, maxCount, maxErr, boundsOK, fmt.Sprintf("%d heap, %d encoded", tk.SizeBytes(), len(enc)), ok)
	return nil
}

// draw returns n values of a named distribution.
func drawValues(rng *rand.Rand, dist string, n int) []float64 {
	out := make([]float64, n)
	for i := range out {
		switch dist {
		case "uniform":
			out[i] = 1000 * rng.Float64()
		case "lognormal":
			out[i] = math.Exp(rng.NormFloat64())
		case "pareto":
			// Pareto with scale 1 and shape 1.5 by inversion.
			out[i] = math.Pow(1-rng.Float64(), -1/1.5)
		}
	}
	return out
}

func quantileTable(r *Report, cfg Config) error {
	n := cfg.streamLen()
	t := newQuantileTable(fmt.Sprintf("%d values per distribution (uniform on [0, 1000), lognormal(0, 1), Pareto(scale 1, shape 1.5)).", n))
	for di, dist := range []string{"uniform", "lognormal", "pareto"} {
		vals := drawValues(cfg.rng(uint64(500+di)), dist, n)
		for _, alpha := range []float64{0.01, 0.05} {
			if err := measureQuantile(t, dist, vals, alpha); err != nil {
				return err
			}
		}
	}
	r.Tables = append(r.Tables, t)
	return nil
}

var reportQuantiles = []float64{0.5, 0.9, 0.99, 0.999}

func newQuantileTable(measures string) *Table {
	return &Table{
		Title:    "Quantiles: relative error against alpha",
		Measures: measures + " Each cell: |estimate - exact| / |exact| for that quantile, exact = the value of rank floor(q(n-1)) in the sorted values.",
		Bound:    "|estimate - exact| <= alpha * |exact|; checked per quantile.",
		Source:   srcDD,
		Header:   []string{"data", "alpha", "values", "p50", "p90", "p99", "p99.9", "bytes", "inside"},
		Checked:  true,
	}
}

func measureQuantile(t *Table, name string, vals []float64, alpha float64) error {
	sk, err := sketch.NewQuantile(sketch.QuantileParams{RelativeAccuracy: alpha})
	if err != nil {
		return err
	}
	for _, v := range vals {
		sk.Add(v)
	}
	sorted := slices.Clone(vals)
	slices.Sort(sorted)
	row := []any{name, alpha, len(vals)}
	ok := true
	for _, q := range reportQuantiles {
		exact := sorted[int(math.Floor(q*float64(len(sorted)-1)))]
		est, _ := sk.Value(q)
		e := relErr(est, exact)
		// 1e-12: float rounding of the bucket's representative value.
		if e > alpha+1e-12 {
			ok = false
		}
		row = append(row, e)
	}
	t.check(ok, "%s alpha=%g", name, alpha)
	enc, err := sk.AppendBinary(nil)
	if err != nil {
		return err
	}
	row = append(row, fmt.Sprintf("%d heap, %d encoded", sk.SizeBytes(), len(enc)), ok)
	t.add(row...)
	return nil
}

// slidingCountTable: a 1 h sliding count at coarse resolutions against the
// exact count of (t-W, t], with the trailing-edge loss the pane rule
// allows.
func slidingCountTable(r *Report, cfg Config) error {
	win := time.Hour
	hours := 24
	queries := 5000
	if cfg.Quick {
		hours, queries = 6, 1000
	}
	rng := cfg.rng(600)
	// Arrivals: a Poisson stream whose rate swings between 0.2/s and 2/s.
	var times []int64
	end := t0 + int64(hours)*int64(time.Hour)
	for t := t0; t < end; {
		phase := float64(t-t0) / float64(3*time.Hour) * 2 * math.Pi
		rate := 1.1 + 0.9*math.Sin(phase)
		t += int64(rng.ExpFloat64() / rate * float64(time.Second))
		times = append(times, t)
	}
	qt := make([]int64, queries)
	for i := range qt {
		qt[i] = t0 + int64(win) + rng.Int64N(end-t0-int64(win))
	}
	slices.Sort(qt)
	t := &Table{
		Title:    "Windowed count at coarse resolutions: the trailing edge",
		Measures: fmt.Sprintf("A %v sliding count (window.SlidingCount) over a %d h Poisson stream (%d events, rate between 0.2/s and 2/s), asked at %d random times, against the exact count of (t-W, t]. Left out = exact - answer, as a share of the exact count.", win, hours, len(times), queries),
		Bound:    "the answer counts exactly the events of (t-W, t] less those in (t-W, paneStart(t)+r-W), a span shorter than one pane r: never more than exact, never missing an event at or after t-W+r; checked per query (package window's documented rule, SlidingCount).",
		Source:   "the pane rule of package window (SlidingCount doc); pane-based sliding windows as in Datar, Gionis, Indyk, Motwani (2002), \"Maintaining stream statistics over sliding windows\", SIAM J. Computing, whose bucketed counts also err only in the oldest bucket (from memory).",
		Header:   []string{"resolution", "panes", "mean left out", "p99 left out", "max left out", "one pane / window", "rule held", "inside"},
		Checked:  true,
	}
	for _, res := range []time.Duration{time.Minute, 5 * time.Minute, 15 * time.Minute, 30 * time.Minute, time.Hour} {
		c, err := window.NewSlidingCount(window.SlidingSpec{Window: win, Resolution: res})
		if err != nil {
			return err
		}
		var shares []float64
		ruleOK := true
		next := 0
		for _, q := range qt {
			for next < len(times) && times[next] <= q {
				c.Add(times[next])
				next++
			}
			got := c.CountAt(q)
			lo := sort.Search(len(times), func(i int) bool { return times[i] > q-int64(win) })
			hi := sort.Search(len(times), func(i int) bool { return times[i] > q })
			exact := hi - lo
			paneStart := q - q%int64(res)
			cut := paneStart + int64(res) - int64(win) // first ns the pane rule counts
			kept := hi - sort.Search(len(times), func(i int) bool { return times[i] >= cut })
			if int(got) != kept || cut-(q-int64(win)) > int64(res) {
				ruleOK = false
			}
			if exact > 0 {
				shares = append(shares, float64(exact-int(got))/float64(exact))
			}
		}
		s := summarize(shares)
		t.check(ruleOK, "resolution %v: an answer differs from the pane rule", res)
		t.add(res.String(), int(win/res), s.Mean, s.P99, s.Max, float64(res)/float64(win), ruleOK, ruleOK)
	}
	r.Tables = append(r.Tables, t)
	return nil
}
