package window

import (
	"bytes"
	"encoding/hex"
	"errors"
	"flag"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// rewrite regenerates the golden files under testdata/:
//
//	go test ./window/ -run 'Golden|Scenario' -rewrite
//
// Golden blobs of released format versions must never change: a new layout
// gets a new version and new files, and the old files stay.
var rewrite = flag.Bool("rewrite", false, "rewrite golden files in testdata/")

type codec interface {
	AppendBinary([]byte) ([]byte, error)
	UnmarshalBinary([]byte) error
}

// goldenStates builds one fixed state per format, each exercising panes,
// raw events and (where present) values.
func goldenStates() map[string]func() codec {
	ts := []int64{t0 + 5*second, t0 + 61*second, t0 + 62*second, t0 + 3*minute, t0 + 3*minute + 1, t0 + 4*minute}
	spec := SlidingSpec{Window: hour, Resolution: minute, Horizon: 90 * second}
	surge := SurgeSpec{Window: 5 * minute, HalfLife: hour, Resolution: minute, Horizon: 90 * second}
	feedV := func(add func(int64, float64) bool) {
		for i, t := range ts {
			add(t, float64(i)*1.5-2)
		}
	}
	return map[string]func() codec{
		"v1-sliding-count": func() codec {
			c := must(NewSlidingCount(spec))
			for _, t := range ts {
				c.Add(t)
			}
			return c
		},
		"v1-sliding-sum":  func() codec { c := must(NewSlidingSum(spec)); feedV(c.Add); return c },
		"v1-sliding-min":  func() codec { c := must(NewSlidingMin(spec)); feedV(c.Add); return c },
		"v1-sliding-max":  func() codec { c := must(NewSlidingMax(spec)); feedV(c.Add); return c },
		"v1-sliding-mean": func() codec { c := must(NewSlidingMean(spec)); feedV(c.Add); return c },
		"v1-decayed": func() codec {
			c := must(NewDecayed(DecaySpec{HalfLife: minute, Horizon: 90 * second}))
			feedV(c.Add)
			return c
		},
		"v1-velocity": func() codec {
			c := must(NewVelocity(VelocitySpec{Short: 5 * minute, Long: hour, Resolution: minute, Horizon: 90 * second}))
			for _, t := range ts {
				c.Add(t)
			}
			return c
		},
		"v1-recency": func() codec {
			c := must(NewRecency(RecencySpec{Gap: 30 * second, Horizon: 90 * second}))
			for _, t := range ts {
				c.Add(t)
			}
			return c
		},
		"v1-sliding-count-empty": func() codec { return must(NewSlidingCount(spec)) },
		"v1-surge": func() codec {
			c := must(NewSurge(surge))
			feedV(func(t int64, _ float64) bool { return c.Add(t) })
			return c
		},
		"v1-surge-empty": func() codec { return must(NewSurge(surge)) },
	}
}

// TestGoldenBlobs: each format's encoding of a fixed state equals the
// stored blob, and the stored blob decodes and re-encodes to itself.
func TestGoldenBlobs(t *testing.T) {
	for name, build := range goldenStates() {
		t.Run(name, func(t *testing.T) {
			path := filepath.Join("testdata", "golden", name+".hex")
			got, err := build().AppendBinary(nil)
			if err != nil {
				t.Fatal(err)
			}
			if *rewrite {
				if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
					t.Fatal(err)
				}
				if err := os.WriteFile(path, []byte(hex.EncodeToString(got)+"\n"), 0o644); err != nil {
					t.Fatal(err)
				}
			}
			want := readHex(t, path)
			if !bytes.Equal(got, want) {
				t.Fatalf("encoding changed:\n got %x\nwant %x", got, want)
			}
			fresh := build()
			fresh.(interface{ Reset() }).Reset()
			if err := fresh.UnmarshalBinary(want); err != nil {
				t.Fatal(err)
			}
			again, _ := fresh.AppendBinary(nil)
			if !bytes.Equal(again, want) {
				t.Fatalf("decode+encode changed the blob: %x", again)
			}
		})
	}
}

func readHex(t *testing.T, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	out, err := hex.DecodeString(strings.TrimSpace(string(b)))
	if err != nil {
		t.Fatal(err)
	}
	return out
}

// TestDecodeErrors: every decoder rejects an unknown version, another kind,
// trailing bytes and truncation with the documented sentinels, and leaves
// the receiver unchanged.
func TestDecodeErrors(t *testing.T) {
	for name, build := range goldenStates() {
		t.Run(name, func(t *testing.T) {
			good, _ := build().AppendBinary(nil)
			cases := map[string]struct {
				b    []byte
				want error
			}{
				"empty":    {nil, ErrCorrupt},
				"version0": {append([]byte{0}, good[1:]...), ErrUnknownVersion},
				"version2": {append([]byte{2}, good[1:]...), ErrUnknownVersion},
				"kind":     {append([]byte{1, 99}, good[2:]...), ErrWrongKind},
				"trailing": {append(bytes.Clone(good), 0), ErrTrailingBytes},
				"flags":    {append([]byte{1, good[1], 0x80}, good[3:]...), ErrCorrupt},
			}
			for i := 1; i < len(good); i++ {
				cases[fmt.Sprintf("truncated at %d", i)] = struct {
					b    []byte
					want error
				}{good[:i], ErrCorrupt}
			}
			for cname, tc := range cases {
				recv := build()
				before, _ := recv.AppendBinary(nil)
				if err := recv.UnmarshalBinary(tc.b); !errors.Is(err, tc.want) {
					t.Errorf("%s: err = %v, want %v", cname, err, tc.want)
				}
				after, _ := recv.AppendBinary(nil)
				if !bytes.Equal(before, after) {
					t.Errorf("%s: receiver changed on error", cname)
				}
			}
		})
	}
}
