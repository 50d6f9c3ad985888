package store

import (
	"fmt"
	"maps"
	"math/rand/v2"
	"testing"

	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/stretchr/testify/require"
)

// mapPart is a Part over a map, with the set of keys changed since the
// last commit.
type mapPart struct {
	m     map[string]string
	dirty map[string]bool
}

func newMapPart() *mapPart { return &mapPart{m: map[string]string{}, dirty: map[string]bool{}} }

func (p *mapPart) set(k, v string) { p.m[k] = v; p.dirty[k] = true }
func (p *mapPart) del(k string)    { delete(p.m, k); p.dirty[k] = true }

func (p *mapPart) Stage(w *PartWriter) error {
	for k := range p.dirty {
		var err error
		if v, ok := p.m[k]; ok {
			err = w.Set([]byte(k), []byte(v))
		} else {
			err = w.Delete([]byte(k))
		}
		if err != nil {
			return err
		}
	}
	clear(p.dirty)
	return nil
}

func scanPart(t testing.TB, s *Store, name string) map[string]string {
	out := map[string]string{}
	require.NoError(t, s.ScanPart(name, func(k, v []byte) error { out[string(k)] = string(v); return nil }))
	return out
}

// A part is written by the commits of its store, atomically with the Mark:
// a crash image taken at any point (with any share of unsynced writes
// surviving) holds exactly the part as of the last commit, through both
// commit paths (batch and ingested table).
func TestPartCommitsWithTheMark(t *testing.T) {
	for _, ingest := range []int{-1, 8} {
		t.Run(fmt.Sprintf("ingest=%d", ingest), func(t *testing.T) {
			mem := vfs.NewCrashableMem()
			s := mustOpen(t, Options{FS: mem, Dir: "db", IngestThreshold: ingest})
			p := newMapPart()
			require.NoError(t, s.AddPart("joinish", p))
			require.Error(t, s.AddPart("joinish", newMapPart()), "a name is registered once")
			other := newMapPart() // a name that extends the first must not see its keys
			require.NoError(t, s.AddPart("joinish2", other))
			other.set("x", "y")
			committed := map[uint64]map[string]string{0: {}}
			r := rand.New(rand.NewPCG(7, uint64(ingest+10)))
			seen := uint64(0)
			for step := range 300 {
				for range 1 + r.IntN(20) {
					k := fmt.Sprintf("k%d", r.IntN(50))
					if r.IntN(4) == 0 {
						p.del(k)
					} else {
						p.set(k, fmt.Sprintf("v%d", r.Uint32()))
					}
				}
				if r.IntN(3) == 0 {
					seen++
					require.NoError(t, s.Commit(Mark{Seen: seen, Resume: seen}))
					committed[seen] = maps.Clone(p.m)
				}
				if step%25 == 24 {
					clone := mem.CrashClone(vfs.CrashCloneCfg{UnsyncedDataPercent: r.IntN(101), RNG: r})
					c := mustOpen(t, Options{FS: clone, Dir: "db"})
					m := c.Mark()
					require.Equal(t, committed[m.Seen], scanPart(t, c, "joinish"), "step %d: part as of commit %d", step, m.Seen)
					require.Equal(t, seen, m.Seen, "every commit is synced")
					require.NoError(t, c.Close())
				}
			}
			require.Equal(t, map[string]string{"x": "y"}, scanPart(t, s, "joinish2"))
			require.NoError(t, s.Close())
		})
	}
}
