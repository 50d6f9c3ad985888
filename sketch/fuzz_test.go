package sketch

import (
	"bytes"
	"errors"
	"os"
	"path/filepath"
	"testing"
)

// fuzzDecoder checks one decoder on arbitrary input: no panic; errors wrap
// one of the documented sentinels; a failed decode leaves the receiver's
// encoding unchanged; an accepted input re-encodes to bytes that decode and
// re-encode identically, and the decoded summary survives use.
func fuzzDecoder(f *testing.F, seeds [][]byte, fresh func() encoder, use func(encoder)) {
	for _, s := range seeds {
		f.Add(s)
		for _, cut := range []int{1, 2, 5, len(s) / 2, len(s) - 1} {
			if cut > 0 && cut < len(s) {
				f.Add(s[:cut])
			}
		}
		f.Add(append(bytes.Clone(s), 0))
		if len(s) > 3 {
			b := bytes.Clone(s)
			b[len(b)/2] ^= 0x5a
			f.Add(b)
			b = bytes.Clone(s)
			b[0] = 9
			f.Add(b)
		}
	}
	f.Fuzz(func(t *testing.T, in []byte) {
		x := fresh()
		before, _ := x.AppendBinary(nil)
		if err := x.UnmarshalBinary(in); err != nil {
			if !errors.Is(err, ErrCorrupt) && !errors.Is(err, ErrUnknownVersion) && !errors.Is(err, ErrTrailingBytes) {
				t.Fatalf("undocumented error: %v", err)
			}
			after, _ := x.AppendBinary(nil)
			if !bytes.Equal(before, after) {
				t.Fatal("receiver changed by a failed decode")
			}
			return
		}
		enc1, err := x.AppendBinary(nil)
		if err != nil {
			t.Fatal(err)
		}
		y := fresh()
		if err := y.UnmarshalBinary(enc1); err != nil {
			t.Fatalf("re-encoding rejected: %v", err)
		}
		enc2, _ := y.AppendBinary(nil)
		if !bytes.Equal(enc1, enc2) {
			t.Fatal("re-encoding not stable")
		}
		_ = x.SizeBytes()
		use(x)
	})
}

func goldenSeeds(f *testing.F, prefix string) [][]byte {
	var out [][]byte
	for _, c := range goldenCases(f) {
		if len(c.file) >= len(prefix) && c.file[:len(prefix)] == prefix {
			b, err := os.ReadFile(filepath.Join("testdata", c.file))
			if err != nil {
				f.Fatal(err)
			}
			out = append(out, b)
		}
	}
	return out
}

func FuzzDistinctUnmarshal(f *testing.F) {
	spec := DistinctSpec{Window: 10 * sec, Resolution: 2 * sec, Horizon: 3 * sec, Precision: 5, ExactLimit: 4}
	fuzzDecoder(f, goldenSeeds(f, "distinct"), func() encoder {
		d, _ := NewDistinct(spec)
		d.Add(100*sec, 1<<40)
		return d
	}, func(e encoder) {
		d := e.(*Distinct)
		n, _ := d.Newest()
		for i := range int64(40) {
			d.Add(n+i*sec/3-2*sec, uint64(i)*0x9e3779b97f4a7c15)
			d.DistinctAt(n + i*sec/5 - 3*sec)
		}
		c, _ := NewDistinct(d.Spec())
		_ = c.Merge(d)
		_ = d.Merge(c)
	})
}

func FuzzCountMinUnmarshal(f *testing.F) {
	fuzzDecoder(f, goldenSeeds(f, "countmin"), func() encoder {
		c, _ := NewCountMin(CountMinParams{Epsilon: 0.3, Delta: 0.3})
		c.Add(7, 3)
		return c
	}, func(e encoder) {
		c := e.(*CountMin)
		c.Add(1, 1)
		_ = c.Estimate(2)
		_ = c.Merge(c)
	})
}

func FuzzTopKUnmarshal(f *testing.F) {
	fuzzDecoder(f, goldenSeeds(f, "topk"), func() encoder {
		s, _ := NewTopK(TopKParams{Capacity: 3})
		s.Add(7, 3)
		return s
	}, func(e encoder) {
		s := e.(*TopK)
		for i := range uint64(20) {
			s.Add(i%7, i)
		}
		_ = s.Top(nil, 3)
		_ = s.TopShare()
		o, _ := NewTopK(s.Params())
		_ = o.Merge(s)
	})
}

func FuzzQuantileUnmarshal(f *testing.F) {
	fuzzDecoder(f, goldenSeeds(f, "quantiles"), func() encoder {
		s, _ := NewQuantile(QuantileParams{MaxBuckets: 16})
		s.Add(3)
		return s
	}, func(e encoder) {
		s := e.(*Quantile)
		for _, x := range []float64{-1e300, -1, 0, 5e-324, 1, 1e300} {
			s.Add(x)
			_, _ = s.Value(0.5)
		}
		_, _ = s.Value(1)
		o, _ := NewQuantile(s.Params())
		_ = o.Merge(s)
	})
}

func FuzzDistinctEverUnmarshal(f *testing.F) {
	fuzzDecoder(f, goldenSeeds(f, "ever"), func() encoder {
		d, _ := NewDistinctEver(DistinctEverSpec{Precision: 5, Horizon: 3 * sec})
		d.Add(100*sec, 1<<40)
		return d
	}, func(e encoder) {
		// Use the decoded state past its horizon and into the dense range.
		d := e.(*DistinctEver)
		n, _ := d.Newest()
		for i := range uint64(300) {
			if d.Add(n+int64(i)*sec/7, i*0x9e3779b97f4a7c15); i%25 == 0 {
				_ = d.DistinctAt(n)
			}
		}
		if _, err := d.AppendBinary(nil); err != nil {
			panic(err)
		}
	})
}
