package tallyward

import (
	"bytes"
	"encoding/hex"
	"flag"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"github.com/tallyward/tallyward/sketch"
	"github.com/tallyward/tallyward/window"
)

var rewriteFormats = flag.Bool("formats.rewrite", false, "write missing golden blobs under testdata/formats/")

// goldenBlob compares an encoding with testdata/formats/<name>.hex. Blobs
// of released versions are kept for good: -formats.rewrite only writes a
// blob that does not exist yet; a changed layout needs a new version and a
// new file, never an edit.
func goldenBlob(t *testing.T, name string, got []byte) []byte {
	t.Helper()
	path := filepath.Join("testdata", "formats", name+".hex")
	if _, err := os.Stat(path); os.IsNotExist(err) && *rewriteFormats {
		require.NoError(t, os.MkdirAll(filepath.Dir(path), 0o755))
		require.NoError(t, os.WriteFile(path, []byte(hex.EncodeToString(got)+"\n"), 0o644))
	}
	raw, err := os.ReadFile(path)
	require.NoError(t, err)
	want, err := hex.DecodeString(strings.TrimSpace(string(raw)))
	require.NoError(t, err)
	require.Equal(t, hex.EncodeToString(want), hex.EncodeToString(got), "%s: the encoder's output changed", name)
	return want
}

// goldenKinds is one feature of each kind stored through a tailed summary
// or a window/sketch aggregate, for the record blob.
func goldenKinds() []Kind {
	return []Kind{
		SlidingCount{Window: time.Hour, Resolution: time.Minute},
		Frequency{},
		Quantile{Q: 0.5},
		TopShare{Capacity: 4},
	}
}

func goldenFeed(aggs []Aggregate) {
	for i := range 12 {
		t := t0 + int64(i)*int64(7*time.Second)
		for _, a := range aggs {
			a.Add(t, float64(i%5)*1.25, uint64(i%3)*0x9e3779b97f4a7c15)
		}
	}
}

func freshAggs(horizon time.Duration) func() []Aggregate {
	return func() []Aggregate {
		var out []Aggregate
		for _, k := range goldenKinds() {
			out = append(out, k.NewAggregate(horizon))
		}
		return out
	}
}

// TestRecordGolden pins the entity record, version 1 (record.go): the
// stored blob decodes into the kinds' aggregates, answers as the fresh
// state does, and re-encodes to itself.
func TestRecordGolden(t *testing.T) {
	const horizon = 20 * time.Second
	r := bareRecord(freshAggs(horizon)())
	r.last = t0 + 77*int64(time.Second)
	goldenFeed(r.aggs(nil))
	b, err := r.AppendBinary(nil)
	require.NoError(t, err)
	want := goldenBlob(t, "record-v1", b)
	got, err := decodeRecord(want, freshAggs(horizon))
	require.NoError(t, err)
	require.Equal(t, r.last, got.last)
	again, err := got.AppendBinary(nil)
	require.NoError(t, err)
	require.Equal(t, want, again)
	at := r.last - int64(5*time.Second)
	for i := range r.features() {
		require.Equal(t, math.Float64bits(r.agg(i).At(at, 0)), math.Float64bits(got.agg(i).At(at, 0)), "feature %d", i)
	}
	last, err := peekLast(want)
	require.NoError(t, err)
	require.Equal(t, r.last, last)
}

// TestTailedSummaryGolden pins the tailed summary wrapper, version 1
// (kinds_sketch.go), around each sketch it carries, with raw events kept
// (a horizon) and without.
func TestTailedSummaryGolden(t *testing.T) {
	for _, k := range []Kind{Frequency{}, Quantile{Q: 0.9}, TopShare{Capacity: 4}} {
		for _, horizon := range []time.Duration{0, 30 * time.Second} {
			name := fmt.Sprintf("tailed-v1-%s-h%ds", strings.Fields(k.Describe())[0], int(horizon.Seconds()))
			t.Run(name, func(t *testing.T) {
				a := k.NewAggregate(horizon)
				goldenFeed([]Aggregate{a})
				b, err := a.AppendBinary(nil)
				require.NoError(t, err)
				want := goldenBlob(t, name, b)
				got := k.NewAggregate(horizon)
				require.NoError(t, got.UnmarshalBinary(want))
				again, err := got.AppendBinary(nil)
				require.NoError(t, err)
				require.Equal(t, want, again)
				n, ok := a.Newest()
				m, ok2 := got.Newest()
				require.Equal(t, n, m)
				require.Equal(t, ok, ok2)
				for _, dt := range []int64{0, -int64(10 * time.Second), -int64(40 * time.Second)} {
					require.Equal(t, math.Float64bits(a.At(n+dt, 0)), math.Float64bits(got.At(n+dt, 0)))
				}
			})
		}
	}
}

// TestProgressGolden pins the pipeline's progress record, version 1
// (progress.go), carried in the store's Mark. The kept blob was written
// from: newest time t0+12345, not flushed, the counters below and the
// future-rejected seqs 17, 401, 402. It decodes to them for good, and
// while the writer writes version 1, decoding and re-encoding gives these
// bytes back (a later version gets its own blob; this one stays).
func TestProgressGolden(t *testing.T) {
	raw, err := os.ReadFile(filepath.Join("testdata", "formats", "progress-v1.hex"))
	require.NoError(t, err)
	want, err := hex.DecodeString(strings.TrimSpace(string(raw)))
	require.NoError(t, err)
	var got progress
	require.NoError(t, got.decode(want))
	require.True(t, got.hasMax)
	require.Equal(t, t0+12345, got.maxT)
	require.False(t, got.flushed)
	require.Equal(t, counters{events: 1000, applied: 990, emitted: 985, late: 7, tooOld: 2,
		rejected: [numReasons]uint64{3, 2, 5}, live: 640, expired: 11, erased: 4, erasedSkips: 1}, got.c)
	if b := got.append(nil); b[0] == want[0] {
		require.Equal(t, hex.EncodeToString(want), hex.EncodeToString(b), "the version-1 writer's output changed")
	}
}

// TestDescribeGolden pins the Describe text of every built-in kind, which
// is stored as its definition: a change here makes every existing store
// refuse to open (ErrDefinitionChanged).
func TestDescribeGolden(t *testing.T) {
	kinds := []Kind{
		SlidingCount{Window: time.Hour}, SlidingSum{Window: time.Hour, Resolution: time.Minute},
		SlidingMin{Window: time.Hour}, SlidingMax{Window: time.Hour}, SlidingMean{Window: time.Hour},
		Decayed{HalfLife: time.Hour}, Decayed{HalfLife: time.Hour, Stat: DecayedVariance},
		Velocity{Short: 5 * time.Minute, Long: time.Hour}, Recency{}, Recency{Stat: SessionEvents, Gap: time.Minute},
		Distinct{Window: time.Hour}, Frequency{}, Frequency{Epsilon: 0.01, Delta: 0.01}, TopShare{}, Quantile{Q: 0.95},
		DistinctEver{}, Surge{Window: time.Hour, HalfLife: 24 * time.Hour},
	}
	var got strings.Builder
	for _, k := range kinds {
		fmt.Fprintf(&got, "%T: %s\n", k, k.Describe())
	}
	path := filepath.Join("testdata", "formats", "describe.txt")
	if _, err := os.Stat(path); os.IsNotExist(err) && *rewriteFormats {
		require.NoError(t, os.WriteFile(path, []byte(got.String()), 0o644))
	}
	want, err := os.ReadFile(path)
	require.NoError(t, err)
	require.Equal(t, string(want), got.String())
	require.True(t, bytes.Contains(want, []byte("frequency epsilon=0.01 delta=0.01")))
}

// Packages window and sketch report decode and spec errors with the same
// values and type, so one errors.Is or errors.As serves both.
func TestSharedErrors(t *testing.T) {
	require.Same(t, window.ErrCorrupt, sketch.ErrCorrupt)
	require.Same(t, window.ErrUnknownVersion, sketch.ErrUnknownVersion)
	require.Same(t, window.ErrTrailingBytes, sketch.ErrTrailingBytes)
	require.Same(t, window.ErrWrongKind, sketch.ErrWrongKind)
	require.Same(t, window.ErrInvalidSpec, sketch.ErrInvalidSpec)

	_, werr := window.NewSlidingCount(window.SlidingSpec{Window: -1})
	_, serr := sketch.NewTopK(sketch.TopKParams{Capacity: -1})
	for _, err := range []error{werr, serr} {
		var se *sketch.SpecError
		require.ErrorAs(t, err, &se)
		require.ErrorIs(t, err, window.ErrInvalidSpec)
	}
	c, _ := sketch.NewCountMin(sketch.CountMinParams{})
	b, _ := c.AppendBinary(nil)
	var q sketch.Quantile
	require.ErrorIs(t, q.UnmarshalBinary(b), window.ErrWrongKind)
	s, _ := window.NewSlidingCount(window.SlidingSpec{Window: time.Minute})
	require.ErrorIs(t, s.UnmarshalBinary(b[:1]), sketch.ErrCorrupt)
}
