package report

import (
	"errors"
	"flag"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"time"
)

// RunOptions are the command-line choices shared by go run ./bench/cmd/report
// and tallyward accuracy.
type RunOptions struct {
	// Out is the report directory. Default "report".
	Out string
	// Quick runs the short accuracy streams and no speed figures.
	// Default false.
	Quick bool
	// Seed of every generated stream. Default 1.
	Seed uint64
	// Input is a user's CSV file of key,item[,value[,time]] rows; when set,
	// the report is on those rows instead of generated ones. Default "".
	Input string
	// Speed adds the speed report (generated data only). Default false.
	Speed bool
	// Speed sizes: see SpeedConfig. Zero means its default.
	SpeedConfig SpeedConfig
	// Progress receives a line as each speed pass ends. Default nil.
	Progress io.Writer
}

// Flags declares the options on fs.
func Flags(fs *flag.FlagSet) *RunOptions {
	o := &RunOptions{}
	fs.StringVar(&o.Out, "out", "report", "report directory (created; report.md and PNG plots)")
	fs.BoolVar(&o.Quick, "quick", false, "short streams (seconds), accuracy only; fails if a figure is outside its bound")
	fs.Uint64Var(&o.Seed, "seed", 1, "seed of every generated stream")
	fs.StringVar(&o.Input, "input", "", "CSV file of key,item[,value[,time]] rows: report on your data")
	fs.BoolVar(&o.Speed, "speed", false, "also measure speed against the naive Pebble baseline and the in-memory ceiling")
	fs.IntVar(&o.SpeedConfig.Entities, "speed.entities", 0, "live entities of the main speed scale (default 1M; a tenth and ten times it are measured too)")
	fs.BoolVar(&o.SpeedConfig.SkipHuge, "speed.skip10x", false, "leave out the scale of ten times -speed.entities")
	fs.IntVar(&o.SpeedConfig.Draws, "speed.draws", 0, "largest number of events of each drawn phase (default 1M)")
	fs.IntVar(&o.SpeedConfig.NaiveEvents, "speed.naive", 0, "events of each phase the naive baseline is timed on (default 100k)")
	fs.IntVar(&o.SpeedConfig.Workers, "speed.workers", 0, "Options.Workers of every measured pipeline (default: the pipeline's default)")
	fs.IntVar(&o.SpeedConfig.LatencyCalls, "speed.calls", 0, "Score calls of each drawn phase timed for latency (default 300k)")
	return o
}

// Generate builds the report the options ask for (not yet written).
// Errors reading the input file wrap ErrBadRow or the file's I/O error.
func Generate(o RunOptions) (*Report, error) {
	start := time.Now()
	var r *Report
	var err error
	if o.Input != "" {
		f, ferr := os.Open(o.Input)
		if ferr != nil {
			return nil, ferr
		}
		rows, rerr := ReadRows(f)
		f.Close()
		if rerr != nil {
			return nil, fmt.Errorf("%s: %w", o.Input, rerr)
		}
		r, err = FromRows(rows, UserParams{})
	} else {
		r, err = Accuracy(Config{Quick: o.Quick, Seed: o.Seed})
		if err == nil && o.Speed && !o.Quick {
			if o.SpeedConfig.Progress == nil {
				o.SpeedConfig.Progress = o.Progress
			}
			err = Speed(r, o.SpeedConfig)
		}
	}
	if err != nil {
		return nil, err
	}
	r.Notes = append(r.Notes, machine(time.Since(start)))
	return r, nil
}

// Main runs the report as a command: it writes the directory, prints a
// summary to stdout and returns the exit code: 0 every figure inside its
// bound, 1 a figure outside or a failure, 2 bad input.
func Main(o RunOptions, stdout, stderr io.Writer) int {
	start := time.Now()
	if o.Progress == nil {
		o.Progress = stderr
	}
	r, err := Generate(o)
	if err != nil {
		fmt.Fprintf(stderr, "report: %v\n", err)
		if errors.Is(err, ErrBadRow) || errors.Is(err, fs.ErrNotExist) {
			return 2
		}
		return 1
	}
	if err := r.Write(o.Out); err != nil {
		fmt.Fprintf(stderr, "report: %v\n", err)
		return 1
	}
	return Summarize(r, o.Out, time.Since(start), stdout)
}

// Summarize prints what was written and every figure outside its bound,
// and returns 1 if there is one, else 0.
func Summarize(r *Report, dir string, took time.Duration, w io.Writer) int {
	fmt.Fprintf(w, "wrote %s (%d tables, %d plots) in %v\n", filepath.Join(dir, "report.md"), len(r.Tables), len(r.Plots), took.Round(time.Second))
	if out := r.Outside(); len(out) > 0 {
		fmt.Fprintf(w, "%d figures outside their bound:\n  %s\n", len(out), strings.Join(out, "\n  "))
		return 1
	}
	fmt.Fprintln(w, "every error figure is inside its published bound")
	return 0
}

// machine describes where and how long the report ran, with the load
// average when the system shows it (the development machine is shared).
func machine(took time.Duration) string {
	load := ""
	if b, err := os.ReadFile("/proc/loadavg"); err == nil {
		if f := strings.Fields(string(b)); len(f) >= 3 {
			load = fmt.Sprintf(", load average %s %s %s", f[0], f[1], f[2])
		}
	}
	return fmt.Sprintf("Machine: %d cores (GOMAXPROCS %d), %s %s/%s%s; the report took %v.",
		runtime.NumCPU(), runtime.GOMAXPROCS(0), runtime.Version(), runtime.GOOS, runtime.GOARCH, load, took.Round(time.Second))
}
