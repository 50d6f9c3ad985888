package sketch

import (
	"bytes"
	"flag"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

var updateGolden = flag.Bool("sketch.update", false, "rewrite testdata/ golden blobs and answers")

// encoder is what every summary in the package implements.
type encoder interface {
	AppendBinary([]byte) ([]byte, error)
	UnmarshalBinary([]byte) error
	SizeBytes() int
	Reset()
}

// goldenCase builds a summary from a seeded stream and renders its answers.
type goldenCase struct {
	file   string
	build  func() encoder
	render func(encoder) string
}

func goldenCases(t testing.TB) []goldenCase {
	spec := DistinctSpec{Window: 10 * sec, Resolution: 2 * sec, Horizon: 3 * sec, Precision: 6, ExactLimit: 20}
	t0 := int64(1_767_225_600) * sec // 2026-01-01T00:00:00Z
	// feed adds n items drawn from u distinct ones, a quarter second apart
	// with up to 2 s of disorder.
	feed := func(n, u int, prefix string, add func(int64, uint64) bool) {
		rng := rand.New(rand.NewPCG(uint64(n), uint64(u)))
		for i := range n {
			add(t0+int64(i)*sec/4-rng.Int64N(2*sec), HashString(fmt.Sprint(prefix, rng.IntN(u))))
		}
	}
	// answers renders head and the answers at newest+dt for each dt.
	answers := func(head string, newest int64, at func(int64) uint64, dts ...int64) string {
		b := []byte(head)
		for _, dt := range dts {
			b = fmt.Appendf(b, " at%+ds=%d", dt/sec, at(newest+dt))
		}
		return string(b)
	}
	distinct := func(n, u int) func() encoder {
		return func() encoder { d := mustDistinct(t, spec); feed(n, u, "acct-", d.Add); return d }
	}
	renderDistinct := func(e encoder) string {
		d := e.(*Distinct)
		newest, _ := d.Newest()
		return answers(fmt.Sprintf("exact=%v", d.Exact()), newest, d.DistinctAt, -3*sec, -sec, 0, 4*sec, 9*sec)
	}
	everSpec := DistinctEverSpec{Precision: 6, Horizon: 3 * sec}
	ever := func(n, u int) func() encoder {
		return func() encoder { d := mustEver(t, everSpec); feed(n, u, "device-", d.Add); return d }
	}
	renderEver := func(e encoder) string {
		d := e.(*DistinctEver)
		newest, _ := d.Newest()
		return answers(fmt.Sprintf("events=%d", d.Count()), newest, d.DistinctAt, -3*sec, -sec, 0, 4*sec)
	}
	return []goldenCase{
		{"distinct_v1_empty.bin", func() encoder { return mustDistinct(t, spec) }, renderDistinct},
		{"distinct_v1_exact.bin", distinct(40, 12), renderDistinct},
		{"distinct_v1_sketch.bin", distinct(400, 300), renderDistinct},
		{"countmin_v1.bin", func() encoder {
			c := mustCM(t, CountMinParams{Epsilon: 0.05, Delta: 0.1})
			for i := range 200 {
				c.Add(HashString(fmt.Sprint("merchant-", i%17)), uint64(1+i%3))
			}
			return c
		}, func(e encoder) string {
			c := e.(*CountMin)
			return fmt.Sprintf("N=%d m0=%d m5=%d absent=%d", c.Count(), c.Estimate(HashString("merchant-0")),
				c.Estimate(HashString("merchant-5")), c.Estimate(HashString("merchant-99")))
		}},
		{"topk_v1.bin", func() encoder {
			s := mustTopK(t, 4)
			rng := rand.New(rand.NewPCG(1, 1))
			for range 100 {
				s.Add(HashString(fmt.Sprint("merchant-", rng.IntN(3)*rng.IntN(4))), 1)
			}
			return s
		}, func(e encoder) string {
			s := e.(*TopK)
			return fmt.Sprintf("N=%d bound=%d top=%v share=%.4f", s.Count(), s.ErrorBound(), s.Top(nil, 4), s.TopShare())
		}},
		{"ever_v1_empty.bin", func() encoder { return mustEver(t, everSpec) }, renderEver},
		{"ever_v1_sparse.bin", ever(60, 25), renderEver},
		{"ever_v1_dense.bin", ever(3000, 2500), renderEver},
		{"quantiles_v1.bin", func() encoder {
			s := mustQ(t, QuantileParams{RelativeAccuracy: 0.02, MaxBuckets: 32})
			rng := rand.New(rand.NewPCG(2, 2))
			for range 300 {
				s.Add((rng.Float64() - 0.2) * 1000)
			}
			s.Add(0)
			return s
		}, func(e encoder) string {
			s := e.(*Quantile)
			var b strings.Builder
			fmt.Fprintf(&b, "n=%d", s.Count())
			for _, q := range []float64{0, 0.05, 0.5, 0.95, 1} {
				v, _ := s.Value(q)
				fmt.Fprintf(&b, " q%.2f=%.6g", q, v)
			}
			return b.String()
		}},
	}
}

// TestGolden decodes the version-1 blobs kept in testdata/ for good, checks
// their rendered answers, and checks that today's encoder still writes the
// same bytes. Regenerate with: go test ./sketch/ -run Golden -sketch.update
func TestGolden(t *testing.T) {
	answersPath := filepath.Join("testdata", "golden_answers.txt")
	var answers strings.Builder
	for _, c := range goldenCases(t) {
		blob, err := c.build().AppendBinary(nil)
		if err != nil {
			t.Fatal(err)
		}
		path := filepath.Join("testdata", c.file)
		if *updateGolden {
			if err := os.WriteFile(path, blob, 0o644); err != nil {
				t.Fatal(err)
			}
		}
		stored, err := os.ReadFile(path)
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(stored, blob) {
			t.Errorf("%s: encoder output changed; a layout change needs a new version and new golden files", c.file)
		}
		fresh := c.build()
		fresh.Reset()
		if err := fresh.UnmarshalBinary(stored); err != nil {
			t.Fatalf("%s: %v", c.file, err)
		}
		fmt.Fprintf(&answers, "%s: %s (%d bytes)\n", c.file, c.render(fresh), len(stored))
	}
	if *updateGolden {
		if err := os.WriteFile(answersPath, []byte(answers.String()), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(answersPath)
	if err != nil {
		t.Fatal(err)
	}
	if string(want) != answers.String() {
		t.Errorf("answers differ:\n got:\n%s\nwant:\n%s", answers.String(), want)
	}
}
