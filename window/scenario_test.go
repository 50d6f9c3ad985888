package window

import (
	"bufio"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"
)

// TestScenarios runs the scripts in testdata/scenarios/*.txt and compares
// the rendered output with the matching .golden file (rewrite with
// -rewrite). The scripts are the readable spec of window semantics.
//
// Script lines (times and durations are integers in ns or Go durations such
// as 90s; '#' starts a comment, echoed):
//
//	sliding window=D resolution=D horizon=D   start a sliding count/sum/min/max/mean
//	decayed halflife=D horizon=D [rebase=K]   start decayed statistics
//	velocity short=D long=D resolution=D horizon=D [alpha=X]
//	recency gap=D horizon=D
//	add T [V]     add an event at T (value V, default 1); prints kept/dropped
//	at T          print every feature of the current aggregate as of T
//	encode        print the size of the encoded state
func TestScenarios(t *testing.T) {
	files, _ := filepath.Glob(filepath.Join("testdata", "scenarios", "*.txt"))
	if len(files) == 0 {
		t.Fatal("no scenarios")
	}
	for _, path := range files {
		t.Run(filepath.Base(path), func(t *testing.T) {
			got := runScenario(t, path)
			golden := strings.TrimSuffix(path, ".txt") + ".golden"
			if *rewrite {
				if err := os.WriteFile(golden, []byte(got), 0o644); err != nil {
					t.Fatal(err)
				}
			}
			want, err := os.ReadFile(golden)
			if err != nil {
				t.Fatal(err)
			}
			if got != string(want) {
				t.Fatalf("output differs from %s (run with -rewrite to accept):\n%s", golden, got)
			}
		})
	}
}

type scenarioAgg interface {
	add(t int64, v float64) bool
	render(t int64) string
	codec
}

type slidingSet struct {
	c  *SlidingCount
	s  *SlidingSum
	mn *SlidingMin
	mx *SlidingMax
	me *SlidingMean
}

func (a *slidingSet) add(t int64, v float64) bool {
	ok := a.c.Add(t)
	a.s.Add(t, v)
	a.mn.Add(t, v)
	a.mx.Add(t, v)
	a.me.Add(t, v)
	return ok
}

func (a *slidingSet) render(t int64) string {
	return fmt.Sprintf("count=%d sum=%s min=%s max=%s mean=%s", a.c.CountAt(t),
		num(a.s.SumAt(t)), num(a.mn.MinAt(t)), num(a.mx.MaxAt(t)), num(a.me.MeanAt(t)))
}

func (a *slidingSet) AppendBinary(b []byte) ([]byte, error) { return a.c.AppendBinary(b) }
func (a *slidingSet) UnmarshalBinary(b []byte) error        { return a.c.UnmarshalBinary(b) }

type decayedAgg struct{ *Decayed }

func (a decayedAgg) add(t int64, v float64) bool { return a.Add(t, v) }
func (a decayedAgg) render(t int64) string {
	return fmt.Sprintf("count=%s sum=%s mean=%s var=%s", num(a.CountAt(t)), num(a.SumAt(t)),
		num(a.MeanAt(t)), num(a.VarianceAt(t)))
}

type velocityAgg struct{ *Velocity }

func (a velocityAgg) add(t int64, _ float64) bool { return a.Add(t) }
func (a velocityAgg) render(t int64) string {
	s, l := a.CountsAt(t)
	return fmt.Sprintf("short=%d long=%d ratio=%s", s, l, num(a.RatioAt(t)))
}

type recencyAgg struct{ *Recency }

func (a recencyAgg) add(t int64, _ float64) bool { return a.Add(t) }
func (a recencyAgg) render(t int64) string {
	f, fok := a.FirstSeenAt(t)
	l, lok := a.LastSeenAt(t)
	s, sok := a.SinceLastAt(t)
	return fmt.Sprintf("first=%s last=%s since=%s session=%d", opt(f, fok), opt(l, lok), opt(s, sok), a.SessionCountAt(t))
}

func opt(x int64, ok bool) string {
	if !ok {
		return "none"
	}
	return dur(x)
}

func num(x float64) string {
	if math.IsNaN(x) {
		return "NaN"
	}
	return strconv.FormatFloat(x, 'g', 6, 64)
}

// dur renders ns as a Go duration when it is a whole number of ms.
func dur(x int64) string {
	if x%1e6 == 0 {
		return time.Duration(x).String()
	}
	return strconv.FormatInt(x, 10)
}

func runScenario(t *testing.T, path string) string {
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var out strings.Builder
	var agg scenarioAgg
	sc := bufio.NewScanner(f)
	for n := 1; sc.Scan(); n++ {
		line := strings.TrimSpace(sc.Text())
		if line == "" || strings.HasPrefix(line, "#") {
			out.WriteString(line + "\n")
			continue
		}
		fields := strings.Fields(line)
		kv := map[string]string{}
		for _, f := range fields[1:] {
			if k, v, ok := strings.Cut(f, "="); ok {
				kv[k] = v
			}
		}
		d := func(k string) int64 {
			x, err := parseTime(kv[k])
			if err != nil {
				t.Fatalf("%s:%d: %s: %v", path, n, k, err)
			}
			return x
		}
		arg := func(i int) string {
			if len(fields) <= i {
				t.Fatalf("%s:%d: missing argument", path, n)
			}
			return fields[i]
		}
		res := ""
		switch fields[0] {
		case "sliding":
			s := SlidingSpec{Window: time.Duration(d("window")), Resolution: time.Duration(d("resolution")), Horizon: time.Duration(d("horizon"))}
			agg = &slidingSet{must(NewSlidingCount(s)), must(NewSlidingSum(s)), must(NewSlidingMin(s)), must(NewSlidingMax(s)), must(NewSlidingMean(s))}
		case "decayed":
			rb, _ := strconv.ParseInt(kv["rebase"], 10, 64)
			agg = decayedAgg{must(NewDecayed(DecaySpec{HalfLife: time.Duration(d("halflife")), Horizon: time.Duration(d("horizon")), RebaseEvery: rb}))}
		case "velocity":
			a, _ := strconv.ParseFloat(kv["alpha"], 64)
			agg = velocityAgg{must(NewVelocity(VelocitySpec{Short: time.Duration(d("short")), Long: time.Duration(d("long")),
				Resolution: time.Duration(d("resolution")), Horizon: time.Duration(d("horizon")), Smoothing: a}))}
		case "recency":
			agg = recencyAgg{must(NewRecency(RecencySpec{Gap: time.Duration(d("gap")), Horizon: time.Duration(d("horizon"))}))}
		case "add":
			ts, err := parseTime(arg(1))
			if err != nil {
				t.Fatalf("%s:%d: %v", path, n, err)
			}
			v := 1.0
			if len(fields) > 2 {
				v, _ = strconv.ParseFloat(fields[2], 64)
			}
			res = "dropped"
			if agg.add(ts, v) {
				res = "kept"
			}
		case "at":
			ts, err := parseTime(arg(1))
			if err != nil {
				t.Fatalf("%s:%d: %v", path, n, err)
			}
			res = agg.render(ts)
		case "encode":
			b, _ := agg.AppendBinary(nil)
			res = fmt.Sprintf("%d bytes", len(b))
		default:
			t.Fatalf("%s:%d: unknown command %q", path, n, fields[0])
		}
		if res != "" {
			res = "  -> " + res
		}
		out.WriteString(line + res + "\n")
	}
	return out.String()
}

// parseTime reads an integer number of ns or a Go duration ("-90s").
func parseTime(s string) (int64, error) {
	if x, err := strconv.ParseInt(s, 10, 64); err == nil {
		return x, nil
	}
	d, err := time.ParseDuration(s)
	return int64(d), err
}
