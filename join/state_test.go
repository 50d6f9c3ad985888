package join

import (
	"bufio"
	"context"
	"encoding/hex"
	"errors"
	"flag"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/attach"
)

var update = flag.Bool("update", false, "rewrite the golden blobs of new encodings (never of old versions)")

func TestMerge(t *testing.T) {
	type ta struct{ T int64 }
	type tb struct{ T int64 }
	a := func(ts ...int64) tallyward.Source[ta] {
		return func(yield func(ta, error) bool) {
			for _, t := range ts {
				if !yield(ta{t}, nil) {
					return
				}
			}
		}
	}
	b := func(ts ...int64) tallyward.Source[tb] {
		return func(yield func(tb, error) bool) {
			for _, t := range ts {
				if !yield(tb{t}, nil) {
					return
				}
			}
		}
	}
	render := func(src tallyward.Source[Either[ta, tb]]) (string, error) {
		var out []string
		for e, err := range src {
			if err != nil {
				return strings.Join(out, " "), err
			}
			if e.IsB {
				out = append(out, fmt.Sprintf("b%d", e.B.T))
			} else {
				out = append(out, fmt.Sprintf("a%d", e.A.T))
			}
		}
		return strings.Join(out, " "), nil
	}
	at := func(x ta) int64 { return x.T }
	bt := func(x tb) int64 { return x.T }
	got, err := render(Merge(a(1, 3, 3, 7), at, b(0, 3, 8, 9), bt))
	require.NoError(t, err)
	require.Equal(t, "b0 a1 a3 a3 b3 a7 b8 b9", got, "by time; the first stream first at equal times")
	got, err = render(Merge(a(), at, b(2), bt))
	require.NoError(t, err)
	require.Equal(t, "b2", got)

	boom := errors.New("read failed")
	bad := func(yield func(tb, error) bool) {
		if yield(tb{1}, nil) {
			yield(tb{}, boom)
		}
	}
	got, err = render(Merge(a(0, 5), at, bad, bt))
	require.ErrorIs(t, err, boom)
	require.Equal(t, "a0 b1", got)

	// Stopping early stops both sources.
	n := 0
	for range Merge(a(1, 2, 3), at, b(1, 2, 3), bt) {
		if n++; n == 2 {
			break
		}
	}
	require.Equal(t, 2, n)
	require.Equal(t, "x", Both[ta, tb](func(ta) string { return "x" }, nil)(OfA[ta, tb](ta{})))
	require.Equal(t, "", Both[ta, tb](func(ta) string { return "x" }, nil)(OfB[ta](tb{})))
}

// partDump runs a small fixed history through the three joins, commits
// with events still held, and returns every stored part key and value.
func partDump(t testing.TB) map[string][][2][]byte {
	h := genHistory(77, 3000, 40, spanGap(3000, 20))
	// A tail that leaves a reset held with a payout, and a payout held for
	// resets still to come, at the commit.
	end := h.evs[len(h.evs)-1].T
	h.evs = append(h.evs,
		act{T: end + minute, Kind: "payout", Acct: "a1", ID: "t1", V: 5},
		act{T: end + 2*minute, Kind: "reset", Acct: "a1", ID: "t2"},
		act{T: end + 3*minute, Kind: "payout", Acct: "a1", ID: "t3", V: 7},
		act{T: end + 10*minute, Kind: "verify", Acct: "a2", ID: "t4", V: 2})
	j := openJoined(t, settled(5*minute), funcSink(func(*TrainingRow) error { return nil }), func(Match[act]) {}, func(Attached[act]) {})
	defer j.p.Close()
	require.NoError(t, j.p.Feed(context.Background(), source(h.evs)))
	require.NoError(t, j.p.Commit(nil))
	st, ok := attach.Store(j.p)
	require.True(t, ok)
	out := map[string][][2][]byte{}
	for _, part := range []string{"label.training", "interval.reset-payout", "asof.verification"} {
		perKind := map[byte]int{} // at most 12 keys of each kind, to keep the blobs small
		require.NoError(t, st.ScanPart(part, func(k, v []byte) error {
			if perKind[k[0]]++; perKind[k[0]] <= 12 {
				out[part] = append(out[part], [2][]byte{append([]byte(nil), k...), append([]byte(nil), v...)})
			}
			return nil
		}))
		require.NotEmpty(t, out[part], part)
	}
	return out
}

// loaders returns fresh joins' decoders, by part name.
func loaders(t testing.TB) map[string]func(k, v []byte) error {
	lj, err := NewLabels(actLabels(maturity, &MemorySink{}))
	require.NoError(t, err)
	iv, err := NewInterval(IntervalSpec[act]{Name: "x", Key: func(act) string { return "" }, Left: func(act) bool { return true },
		Right: func(act) bool { return true }, Hi: 30 * 60 * 1e9, Emit: func(Match[act]) {}})
	require.NoError(t, err)
	ao, err := NewAsOf(AsOfSpec[act]{Name: "x", Key: func(act) string { return "" }, Left: func(act) bool { return true },
		Right: func(act) bool { return true }, Value: func(act) float64 { return 0 }, Emit: func(Attached[act]) {}})
	require.NoError(t, err)
	skipDef := func(load func(k, v []byte) error) func(k, v []byte) error {
		return func(k, v []byte) error {
			if string(k) == "d" { // the definition, checked by attachPart
				return nil
			}
			return load(k, v)
		}
	}
	return map[string]func(k, v []byte) error{"label.training": skipDef(lj.load), "interval.reset-payout": skipDef(iv.load), "asof.verification": skipDef(ao.load)}
}

// A join reopened with another definition refuses to load state shaped by
// the old one, and names both.
func TestJoinDefinitionChecked(t *testing.T) {
	dir := t.TempDir()
	opts := settled(0)
	opts.Dir = dir
	open := func(m time.Duration) error {
		p, _, err := OpenLabels(actSpec(), opts, actLabels(m, &MemorySink{}))
		if err != nil {
			return err
		}
		require.NoError(t, p.Process(act{T: base + sec, Kind: "pay", Acct: "a", ID: "p1"}))
		return p.Close()
	}
	require.NoError(t, open(time.Hour))
	require.NoError(t, open(time.Hour))
	err := open(2 * time.Hour)
	require.ErrorIs(t, err, ErrDefinitionChanged)
	require.ErrorContains(t, err, "maturity=3600000000000")
	require.ErrorContains(t, err, "maturity=7200000000000")
}

// Golden blobs of each stored join encoding (version 1), kept for good: a
// later version must still decode them. The encodings of the current run
// must equal them byte for byte while version 1 is the one written.
func TestJoinStateGolden(t *testing.T) {
	dump := partDump(t)
	load := loaders(t)
	for part, kvs := range dump {
		path := filepath.Join("testdata", "golden", part+".v1.hex")
		if *update {
			var b strings.Builder
			for _, kv := range kvs {
				fmt.Fprintf(&b, "%x %x\n", kv[0], kv[1])
			}
			require.NoError(t, os.MkdirAll(filepath.Dir(path), 0o755))
			require.NoError(t, os.WriteFile(path, []byte(b.String()), 0o644))
		}
		f, err := os.Open(path)
		require.NoError(t, err)
		sc := bufio.NewScanner(f)
		sc.Buffer(nil, 1<<20)
		i := 0
		for sc.Scan() {
			ks, vs, _ := strings.Cut(sc.Text(), " ")
			k, err := hex.DecodeString(ks)
			require.NoError(t, err)
			v, err := hex.DecodeString(vs)
			require.NoError(t, err)
			require.NoError(t, load[part](k, v), "%s line %d decodes", part, i+1)
			require.Less(t, i, len(kvs))
			require.Equal(t, kvs[i][0], k, "%s line %d: key", part, i+1)
			require.Equal(t, kvs[i][1], v, "%s line %d: value", part, i+1)
			i++
		}
		require.NoError(t, sc.Err())
		require.Equal(t, len(kvs), i, part)
		f.Close()
	}
}

// No decoder of join state panics, whatever the bytes; errors only.
func FuzzJoinStateDecode(f *testing.F) {
	for part, kvs := range partDump(f) {
		for i, kv := range kvs {
			if i < 8 {
				f.Add(part, kv[0], kv[1])
				f.Add(part, kv[0], kv[1][:len(kv[1])/2])
			}
		}
	}
	f.Fuzz(func(t *testing.T, part string, k, v []byte) {
		load := loaders(t)[part]
		if load == nil {
			return
		}
		_ = load(k, v)
	})
}
