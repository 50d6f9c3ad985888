package store

import (
	"bytes"
	"fmt"
	"maps"
	"math/rand/v2"
	"strings"
	"sync"
	"testing"

	"github.com/cockroachdb/pebble/v2/vfs"
)

// walCrashFS takes a crash image of a crashable MemFS from inside the n-th
// write or sync of a WAL file, i.e. in the middle of a commit, before that
// write reaches the filesystem.
type walCrashFS struct {
	vfs.FS
	mem *vfs.MemFS

	mu    sync.Mutex
	armed int // WAL operations left before the image; < 0: disarmed
	cfg   vfs.CrashCloneCfg
	image *vfs.MemFS
}

func (w *walCrashFS) hook(name string) {
	if !strings.HasSuffix(name, ".log") {
		return
	}
	w.mu.Lock()
	defer w.mu.Unlock()
	if w.armed < 0 {
		return
	}
	if w.armed == 0 {
		w.image = w.mem.CrashClone(w.cfg)
	}
	w.armed--
}

func (w *walCrashFS) wrap(name string, f vfs.File, err error) (vfs.File, error) {
	if err != nil {
		return f, err
	}
	return &walCrashFile{File: f, fs: w, name: name}, nil
}

func (w *walCrashFS) Create(name string, c vfs.DiskWriteCategory) (vfs.File, error) {
	f, err := w.FS.Create(name, c)
	return w.wrap(name, f, err)
}

func (w *walCrashFS) ReuseForWrite(oldname, newname string, c vfs.DiskWriteCategory) (vfs.File, error) {
	f, err := w.FS.ReuseForWrite(oldname, newname, c)
	return w.wrap(newname, f, err)
}

type walCrashFile struct {
	vfs.File
	fs   *walCrashFS
	name string
}

func (f *walCrashFile) Write(p []byte) (int, error) {
	f.fs.hook(f.name)
	return f.File.Write(p)
}

func (f *walCrashFile) Sync() error {
	f.fs.hook(f.name)
	return f.File.Sync()
}

func (f *walCrashFile) SyncData() error {
	f.fs.hook(f.name)
	return f.File.SyncData()
}

// TestCrashExposesWholeCommits takes crash images of the filesystem
// between commits and in the middle of a commit (from inside a WAL write
// or sync), keeping a random share of unsynced data, and checks that the
// image opens to exactly one committed cut: the Mark and the records of
// the last commit that returned, or, for an image taken inside a commit,
// possibly those of that commit, never a mixture.
func TestCrashExposesWholeCommits(t *testing.T) {
	t.Parallel()
	seeds, steps := uint64(4), 60
	if raceEnabled {
		seeds, steps = 1, 20
	}
	for seed := uint64(1); seed <= seeds; seed++ {
		t.Run(fmt.Sprintf("seed=%d", seed), func(t *testing.T) { crashRun(t, seed, steps) })
	}
}

type cut struct {
	mark Mark
	recs map[string]rec
}

func crashRun(t *testing.T, seed uint64, steps int) {
	r := rand.New(rand.NewPCG(seed, 0xc4a5))
	mem := vfs.NewCrashableMem()
	fs := &walCrashFS{FS: mem, mem: mem, armed: -1}
	s := mustOpen(t, Options{FS: fs, CacheBytes: 3_000})
	defer func() { s.Close() }()
	tb := NewTable(s, "t", 0, decodeTV)
	cur := map[string]rec{}
	last := cut{recs: map[string]rec{}}
	images, midCommit := 0, 0

	check := func(image *vfs.MemFS, allowed ...cut) {
		t.Helper()
		cs := mustOpen(t, Options{FS: image})
		defer cs.Close()
		got := cut{mark: cs.Mark(), recs: storedRecords(t, cs.DB(), "t")}
		for _, c := range allowed {
			if got.mark.Seen == c.mark.Seen {
				if !bytes.Equal(got.mark.Cursor, c.mark.Cursor) || got.mark.Watermark != c.mark.Watermark {
					t.Fatalf("image mark %+v, committed %+v", got.mark, c.mark)
				}
				if !maps.Equal(got.recs, c.recs) {
					t.Fatalf("image at mark %d: %d records differ from the commit's %d", c.mark.Seen, len(got.recs), len(c.recs))
				}
				// The image is a working store: it reads its records
				// through a table too.
				ct := NewTable(cs, "t", 0, decodeTV)
				for k, want := range c.recs {
					sl, err := ct.Get(k)
					if err != nil || sl == nil || recOf(sl.Value) != want {
						t.Fatalf("image get %s: %v %v, want %+v", k, sl, err, want)
					}
				}
				images++
				return
			}
		}
		t.Fatalf("image mark %+v is none of the allowed cuts", got.mark)
	}

	for step := 1; step <= steps; step++ {
		// A burst of changes, large enough that a commit spans several
		// WAL writes.
		for range 20 + r.IntN(200) {
			k := fmt.Sprintf("e%03d", r.IntN(400))
			if r.IntN(10) == 0 {
				if _, err := tb.Delete(k); err != nil {
					t.Fatal(err)
				}
				delete(cur, k)
				continue
			}
			sl, err := tb.Get(k)
			if err != nil {
				t.Fatal(err)
			}
			if sl == nil {
				v := rec{Last: int64(step), N: 1, Pad: r.IntN(400)}
				tb.Insert(k, v.value())
				cur[k] = v
				continue
			}
			sl.Value.N++
			sl.Value.Last = int64(step)
			sl.Value.Pad = bytes.Repeat([]byte{'p'}, r.IntN(400))
			tb.Touch(sl)
			cur[k] = recOf(sl.Value)
		}
		cfg := vfs.CrashCloneCfg{UnsyncedDataPercent: r.IntN(101), RNG: rand.New(rand.NewPCG(seed, uint64(step)))}
		// Uncommitted changes are never in an image.
		if r.IntN(4) == 0 {
			check(mem.CrashClone(cfg), last)
		}
		next := cut{mark: Mark{Seen: uint64(step), Resume: uint64(step), Watermark: int64(step) * 7, Cursor: fmt.Appendf(nil, "pos-%d", step)}, recs: maps.Clone(cur)}
		mid := r.IntN(2) == 0
		if mid {
			fs.mu.Lock()
			fs.armed, fs.cfg, fs.image = r.IntN(6), cfg, nil
			fs.mu.Unlock()
		}
		if err := s.Commit(next.mark); err != nil {
			t.Fatal(err)
		}
		if mid {
			fs.mu.Lock()
			image := fs.image
			fs.armed = -1
			fs.mu.Unlock()
			if image != nil {
				midCommit++
				check(image, last, next)
			}
		}
		last = next
		check(mem.CrashClone(cfg), last)
		// Now and then the process "restarts" from a crash image.
		if r.IntN(8) == 0 {
			s.Close()
			mem = mem.CrashClone(cfg)
			fs = &walCrashFS{FS: mem, mem: mem, armed: -1}
			s = mustOpen(t, Options{FS: fs, CacheBytes: 3_000})
			tb = NewTable(s, "t", 0, decodeTV)
			if s.Mark().Seen != last.mark.Seen {
				t.Fatalf("restart at mark %d, want %d", s.Mark().Seen, last.mark.Seen)
			}
		}
	}
	if midCommit == 0 {
		t.Fatal("no image was taken inside a commit")
	}
	t.Logf("%d images checked, %d inside a commit", images, midCommit)
}
