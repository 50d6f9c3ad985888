package source_test

import (
	"bytes"
	"context"
	"flag"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/parquet-go/parquet-go"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/sink"
	"github.com/tallyward/tallyward/source"
	"github.com/tallyward/tallyward/specfile"
)

// Replay throughput against a decode-only baseline on the same files, in
// the same run:
//
//	go test ./source/ -run '^$' -bench Replay -benchtime 1x -count 3
//
// benchstat recipe: run with -count 6 on two revisions and compare with
// benchstat old.txt new.txt; read events/s and the replay/decode ratio.
var (
	benchEvents  = flag.Int("bench-events", 1_000_000, "events per benchmark input file")
	benchWorkers = flag.Int("bench-workers", 1, "pipeline workers (Options.Workers) of the core and replay runs")
)

const benchSpec = `version: 1
events:
  time: {field: ts, format: unix_ms}
  fields:
    - {name: kind, type: string}
    - {name: account, type: string}
    - {name: device, type: string}
    - {name: amount, type: number, optional: true}
run: {mode: settled, max_disorder: 1m}
entities:
  - name: account
    key: account
    features:
      - {name: logins_1h, kind: sliding_count, window: 1h, when: [{field: kind, equals: login}]}
      - {name: spend_24h, kind: sliding_sum, window: 24h, value: amount, when: [{field: kind, equals: pay}]}
      - {name: devices_24h, kind: distinct, window: 24h, item: device}
      - {name: pace, kind: decayed, half_life: 2h}
  - name: device
    key: device
    features:
      - {name: accounts_24h, kind: distinct, window: 24h, item: account}
`

type benchRec struct {
	TS      int64   `parquet:"ts"`
	Kind    string  `parquet:"kind"`
	Account string  `parquet:"account"`
	Device  string  `parquet:"device"`
	Amount  float64 `parquet:"amount"`
}

var benchFiles struct {
	once  sync.Once
	dir   string
	paths map[string]string
	err   error
}

// benchInputs writes the same seeded traffic (about 12 simulated days,
// 20k accounts, 40k devices, Zipf-skewed) as JSON lines, CSV and Parquet,
// once per process.
func benchInputs(b *testing.B) map[string]string {
	benchFiles.once.Do(func() {
		dir, err := os.MkdirTemp("", "tallyward-bench-")
		if err != nil {
			benchFiles.err = err
			return
		}
		benchFiles.dir = dir
		rng := rand.New(rand.NewPCG(42, 42))
		za := rand.NewZipf(rng, 1.1, 1, 19_999)
		zd := rand.NewZipf(rng, 1.1, 1, 39_999)
		recs := make([]benchRec, *benchEvents)
		t := int64(1_767_225_600_000)
		for i := range recs {
			t += rng.Int64N(2000)
			r := benchRec{TS: t - rng.Int64N(30_000), Account: fmt.Sprintf("acct-%05d", za.Uint64()), Device: fmt.Sprintf("dev-%05d", zd.Uint64()), Kind: "login"}
			if rng.IntN(4) == 0 {
				r.Kind, r.Amount = "pay", float64(rng.IntN(100000))/100
			}
			recs[i] = r
		}
		var js, cs bytes.Buffer
		cs.WriteString("ts,kind,account,device,amount\n")
		for _, r := range recs {
			fmt.Fprintf(&js, `{"ts":%d,"kind":%q,"account":%q,"device":%q,"amount":%v}`+"\n", r.TS, r.Kind, r.Account, r.Device, r.Amount)
			fmt.Fprintf(&cs, "%d,%s,%s,%s,%v\n", r.TS, r.Kind, r.Account, r.Device, r.Amount)
		}
		benchFiles.paths = map[string]string{
			"jsonl":   filepath.Join(dir, "ev.jsonl"),
			"csv":     filepath.Join(dir, "ev.csv"),
			"parquet": filepath.Join(dir, "ev.parquet"),
		}
		if err := os.WriteFile(benchFiles.paths["jsonl"], js.Bytes(), 0o644); err != nil {
			benchFiles.err = err
		}
		if err := os.WriteFile(benchFiles.paths["csv"], cs.Bytes(), 0o644); err != nil {
			benchFiles.err = err
		}
		if err := parquet.WriteFile(benchFiles.paths["parquet"], recs, parquet.Compression(&parquet.Snappy)); err != nil {
			benchFiles.err = err
		}
	})
	if benchFiles.err != nil {
		b.Fatal(benchFiles.err)
	}
	return benchFiles.paths
}

func BenchmarkReplay(b *testing.B) {
	paths := benchInputs(b)
	f, err := specfile.Parse("bench.yaml", []byte(benchSpec))
	if err != nil {
		b.Fatal(err)
	}
	opts := source.Options{MaxDisorder: f.Options.MaxDisorder}
	for _, format := range []string{"jsonl", "csv", "parquet"} {
		in := []string{paths[format]}
		// decode: read and merge the file, nothing else.
		b.Run(format+"/decode", func(b *testing.B) {
			n := 0
			cpu0 := cpuTime()
			for b.Loop() {
				r, err := source.Open(in, f.Schema, opts, nil, 0)
				if err != nil {
					b.Fatal(err)
				}
				for _, err := range r.Events() {
					if err != nil {
						b.Fatal(err)
					}
					n++
				}
				r.Close()
			}
			b.ReportMetric(float64(n)/b.Elapsed().Seconds(), "events/s")
			b.ReportMetric(float64(n)/(cpuTime()-cpu0).Seconds(), "events/cpu-s")
		})
		// core: the pipeline alone, fed events decoded beforehand (no
		// table): the share of replay time that is not the file layer.
		b.Run(format+"/core", func(b *testing.B) {
			r, err := source.Open(in, f.Schema, opts, nil, 0)
			if err != nil {
				b.Fatal(err)
			}
			var evs []specfile.Event
			for ev, err := range r.Events() {
				if err != nil {
					b.Fatal(err)
				}
				evs = append(evs, ev)
			}
			r.Close()
			n := 0
			cpu0 := cpuTime()
			b.ResetTimer()
			for b.Loop() {
				spec := f.Spec
				spec.Emit = func(tallyward.Row[specfile.Event]) {}
				o := f.Options
				o.Dir = filepath.Join(b.TempDir(), "state")
				o.Workers = *benchWorkers
				p, err := tallyward.Open(spec, o)
				if err != nil {
					b.Fatal(err)
				}
				if err := p.Replay(context.Background(), func(yield func(specfile.Event, error) bool) {
					for _, e := range evs {
						if !yield(e, nil) {
							return
						}
					}
				}); err != nil {
					b.Fatal(err)
				}
				n += len(evs)
				p.Close()
			}
			b.ReportMetric(float64(n)/b.Elapsed().Seconds(), "events/s")
			b.ReportMetric(float64(n)/(cpuTime()-cpu0).Seconds(), "events/cpu-s")
		})
		// replay: decode + the pipeline (5 features, Settled, state in
		// Pebble on disk, commits every 100k events) + a Parquet table,
		// as the command runs it; replay-ahead reads through Ahead, as
		// the command does.
		for _, ahead := range []bool{false, true} {
			name := map[bool]string{false: "/replay", true: "/replay-ahead"}[ahead]
			b.Run(format+name, func(b *testing.B) {
				n := 0
				cpu0 := cpuTime()
				for b.Loop() {
					dir := b.TempDir()
					r, err := source.Open(in, f.Schema, opts, nil, 0)
					if err != nil {
						b.Fatal(err)
					}
					p, table := openBenchPipeline(b, f, dir)
					p.SetCommitHook(func(cp tallyward.CommitPoint) ([]byte, error) {
						if _, err := table.Commit(); err != nil {
							return nil, err
						}
						return r.CursorAt(cp.Resume)
					})
					src := r.Events()
					if ahead {
						src = source.Ahead(src) // decoding on a goroutine of its own
					}
					if err := p.Replay(context.Background(), src); err != nil {
						b.Fatal(err)
					}
					p.SetCommitHook(nil)
					if err := table.Close(); err != nil {
						b.Fatal(err)
					}
					n += int(p.Stats().Events)
					p.Close()
					r.Close()
				}
				b.ReportMetric(float64(n)/b.Elapsed().Seconds(), "events/s")
				b.ReportMetric(float64(n)/(cpuTime()-cpu0).Seconds(), "events/cpu-s")
			})
		}
	}
}

func openBenchPipeline(b *testing.B, f *specfile.File, dir string) (*tallyward.Pipeline[specfile.Event], sink.Table) {
	var table sink.Table
	row := sink.Row{Fields: make([]specfile.Value, len(f.OutputFields))}
	spec := f.Spec
	spec.Emit = func(r tallyward.Row[specfile.Event]) {
		for i, fi := range f.OutputFields {
			row.Fields[i] = r.Event.Fields[fi]
		}
		row.Time, row.Values = r.Time, r.Values
		if err := table.Write(row); err != nil {
			b.Fatal(err)
		}
	}
	o := f.Options
	o.Dir = filepath.Join(dir, "state")
	o.Workers = *benchWorkers
	p, err := tallyward.Open(spec, o)
	if err != nil {
		b.Fatal(err)
	}
	cols := sink.Columns{Time: f.Schema.TimeField, Features: p.Names()}
	for _, fi := range f.OutputFields {
		cols.Fields = append(cols.Fields, f.Schema.Fields[fi])
	}
	table, err = sink.Open(filepath.Join(dir, "out.parquet"), sink.Parquet, cols, -1)
	if err != nil {
		b.Fatal(err)
	}
	return p, table
}

// cpuTime is the process's user+system CPU time. On a machine shared with
// other work, events per CPU second is the steadier figure; wall-clock
// events/s is reported beside it.
func cpuTime() time.Duration {
	var ru syscall.Rusage
	syscall.Getrusage(syscall.RUSAGE_SELF, &ru)
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

func TestMain(m *testing.M) {
	flag.Parse()
	code := m.Run()
	if benchFiles.dir != "" {
		os.RemoveAll(benchFiles.dir)
	}
	os.Exit(code)
}

// BenchmarkResume: reaching the last tenth of a file after a restart, by
// seeking to a stored cursor against re-decoding and skipping the first
// nine tenths (tallyward.Skip), the way a source without positions must.
//
//	go test ./source/ -run '^$' -bench Resume -benchtime 1x
func BenchmarkResume(b *testing.B) {
	paths := benchInputs(b)
	f, err := specfile.Parse("bench.yaml", []byte(benchSpec))
	if err != nil {
		b.Fatal(err)
	}
	opts := source.Options{MaxDisorder: f.Options.MaxDisorder}
	for _, format := range []string{"jsonl", "csv", "parquet"} {
		in := []string{paths[format]}
		at := uint64(*benchEvents) * 9 / 10
		r, err := source.Open(in, f.Schema, opts, nil, 0)
		if err != nil {
			b.Fatal(err)
		}
		readAll(b, r, int(at))
		cur, err := r.CursorAt(at)
		if err != nil {
			b.Fatal(err)
		}
		r.Close()
		b.Run(format+"/seek", func(b *testing.B) {
			for b.Loop() {
				r, err := source.Open(in, f.Schema, opts, cur, at)
				if err != nil {
					b.Fatal(err)
				}
				readAll(b, r, -1)
				r.Close()
			}
		})
		b.Run(format+"/skip", func(b *testing.B) {
			for b.Loop() {
				r, err := source.Open(in, f.Schema, opts, nil, 0)
				if err != nil {
					b.Fatal(err)
				}
				for _, err := range tallyward.Skip(r.Events(), at) {
					if err != nil {
						b.Fatal(err)
					}
				}
				r.Close()
			}
		})
	}
}
