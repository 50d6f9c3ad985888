package store

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/cockroachdb/pebble/v2/vfs/errorfs"
)

func TestMarkRoundTrip(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	cases := []Mark{
		{},
		{Seen: math.MaxUint64, Resume: math.MaxUint64, Watermark: math.MinInt64},
		{Seen: 1, Watermark: math.MaxInt64, Cursor: []byte{0}, Extra: []byte{}},
	}
	for range 500 {
		seen := r.Uint64() >> r.UintN(64)
		m := Mark{Seen: seen, Resume: seen - min(seen, r.Uint64N(1000)), Watermark: r.Int64() - math.MaxInt64/2}
		if r.IntN(2) == 0 {
			m.Cursor = make([]byte, r.IntN(40))
			for i := range m.Cursor {
				m.Cursor[i] = byte(r.Uint32())
			}
		}
		m.Extra = bytes.Repeat([]byte{byte(r.Uint32())}, r.IntN(300))
		cases = append(cases, m)
	}
	for _, m := range cases {
		b, err := m.AppendBinary([]byte("prefix"))
		if err != nil || !bytes.HasPrefix(b, []byte("prefix")) {
			t.Fatalf("append: %v", err)
		}
		var got Mark
		if err := got.UnmarshalBinary(b[len("prefix"):]); err != nil {
			t.Fatalf("%+v: %v", m, err)
		}
		if got.Seen != m.Seen || got.Resume != m.Resume || got.Watermark != m.Watermark ||
			!bytes.Equal(got.Cursor, m.Cursor) || !bytes.Equal(got.Extra, m.Extra) {
			t.Fatalf("round trip %+v -> %+v", m, got)
		}
		again, _ := got.AppendBinary(nil)
		if !bytes.Equal(again, b[len("prefix"):]) {
			t.Fatalf("re-encoding differs for %+v", m)
		}
	}
}

func TestMarkCorrupt(t *testing.T) {
	good, _ := Mark{Seen: 9, Resume: 4, Watermark: -3, Cursor: []byte("cur"), Extra: []byte("x")}.AppendBinary(nil)
	bad := map[string][]byte{
		"empty":           {},
		"version 0":       append([]byte{0}, good[1:]...),
		"version 2":       append([]byte{2}, good[1:]...),
		"trailing":        append(bytes.Clone(good), 0),
		"resume > seen":   func() []byte { b, _ := Mark{Seen: 1, Resume: 2}.AppendBinary(nil); return b }(),
		"cursor too long": {1, 0, 0, 0, 200, 'a'},
	}
	for i := 1; i < len(good); i++ {
		bad[fmt.Sprintf("truncated at %d", i)] = good[:i]
	}
	sentinel := Mark{Seen: 77, Cursor: []byte("keep")}
	for name, b := range bad {
		m := sentinel
		err := m.UnmarshalBinary(b)
		if !errors.Is(err, ErrCorrupt) {
			t.Errorf("%s: error %v, want ErrCorrupt", name, err)
		}
		if m.Seen != 77 || string(m.Cursor) != "keep" {
			t.Errorf("%s: receiver changed on error: %+v", name, m)
		}
	}
}

// corruptRaw writes raw bytes under key directly into a store's
// committed database, bypassing the commit protocol.
func corruptRaw(t *testing.T, fs vfs.FS, key, val []byte) {
	t.Helper()
	s := mustOpen(t, Options{FS: fs})
	if err := s.Commit(Mark{}); err != nil { // persist the salt
		t.Fatal(err)
	}
	if err := s.DB().Set(key, val, pebble.Sync); err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
}

func TestCorruptStoredValuesNameTheKey(t *testing.T) {
	t.Run("mark", func(t *testing.T) {
		fs := vfs.NewMem()
		corruptRaw(t, fs, metaKey(metaMark), []byte{9, 9})
		_, err := Open(Options{FS: fs})
		if !errors.Is(err, ErrCorrupt) || !strings.Contains(err.Error(), "mark") {
			t.Fatalf("open over a corrupt mark: %v", err)
		}
	})
	t.Run("salt", func(t *testing.T) {
		fs := vfs.NewMem()
		corruptRaw(t, fs, metaKey(metaSalt), []byte("short"))
		_, err := Open(Options{FS: fs})
		if !errors.Is(err, ErrCorrupt) || !strings.Contains(err.Error(), "salt") {
			t.Fatalf("open over a corrupt salt: %v", err)
		}
	})
	t.Run("tombstone", func(t *testing.T) {
		fs := vfs.NewMem()
		corruptRaw(t, fs, []byte{tagTombstone, 1, 2, 3}, nil)
		_, err := Open(Options{FS: fs})
		if !errors.Is(err, ErrCorrupt) || !strings.Contains(err.Error(), "tombstone") {
			t.Fatalf("open over a short tombstone key: %v", err)
		}
	})
	t.Run("record", func(t *testing.T) {
		fs := vfs.NewMem()
		corruptRaw(t, fs, RecordKey(nil, "t", "entity-with-bad-bytes"), []byte{1, 0x80})
		s := mustOpen(t, Options{FS: fs})
		defer s.Close()
		tb := NewTable(s, "t", 0, decodeTV)
		sl, err := tb.Get("entity-with-bad-bytes")
		if sl != nil || !errors.Is(err, ErrCorrupt) || !strings.Contains(err.Error(), "entity-with-bad-bytes") {
			t.Fatalf("get of a corrupt record: %v, %v", sl, err)
		}
		// A corrupt record is the caller's problem, not a failed store.
		if errors.Is(err, ErrFailed) || s.Err() != nil {
			t.Fatalf("corrupt record failed the store: %v / %v", err, s.Err())
		}
		tb.Insert("other", rec{Last: 1, N: 1}.value())
		if err := s.Commit(Mark{Seen: 1}); err != nil {
			t.Fatal(err)
		}
		// The sweep of a corrupt record reports it by key, too.
		// (Written before the table is made: a table over no stored
		// record knows that what it does not cache is absent.)
		if err := s.DB().Set(RecordKey(nil, "e", "peek-bad"), []byte{7}, pebble.Sync); err != nil {
			t.Fatal(err)
		}
		if err := s.DB().Set(expiryKey(nil, 16, "e", "peek-bad"), nil, pebble.Sync); err != nil {
			t.Fatal(err)
		}
		et := NewTable(s, "e", 100, decodeTV)
		et.PeekLast = peekTV
		if _, err := s.Sweep(1000); !errors.Is(err, ErrCorrupt) || !strings.Contains(err.Error(), "peek-bad") {
			t.Fatalf("sweep over a corrupt record: %v", err)
		}
	})
	t.Run("expiry key", func(t *testing.T) {
		fs := vfs.NewMem()
		corruptRaw(t, fs, []byte{tagExpiry, 0x80, 0, 0, 0, 0, 0, 0, 1, 0x7f}, nil)
		s := mustOpen(t, Options{FS: fs})
		defer s.Close()
		NewTable(s, "t", 100, decodeTV)
		if _, err := s.Sweep(math.MaxInt64); !errors.Is(err, ErrCorrupt) {
			t.Fatalf("sweep over a corrupt index key: %v", err)
		}
	})
}

func TestOptionsValidateReportsAll(t *testing.T) {
	o := Options{CacheBytes: -1, BlockCacheBytes: -2, MemTableBytes: -3}
	err := o.Validate()
	if err == nil || !strings.Contains(err.Error(), "CacheBytes -1") || !strings.Contains(err.Error(), "BlockCacheBytes -2") ||
		!strings.Contains(err.Error(), "MemTableBytes -3") {
		t.Fatalf("validate: %v", err)
	}
	if _, err := Open(o); err == nil {
		t.Fatal("open accepted invalid options")
	}
	var z Options
	z.EnsureDefaults()
	if z.CacheBytes <= 0 || z.BlockCacheBytes <= 0 || z.MemTableBytes <= 0 || z.FS == nil || z.Validate() != nil {
		t.Fatalf("defaults: %+v", z)
	}
}

// TestFailedCommitGivesBackHands: the commit's goroutine wins the hands of
// frozen slots a few ahead of encoding them; when it fails on a record
// before them, the slots it held must be left for the caller to claim (a
// hand left busy would make the caller's next Get of them wait forever),
// with their values untouched.
func TestFailedCommitGivesBackHands(t *testing.T) {
	s := mustOpen(t, Options{FS: vfs.NewMem(), CacheBytes: 1 << 20})
	defer s.Close()
	tb := NewTable(s, "t", 100, decodeTV)
	hinted := 0
	tb.HintValue = func(*tv) { hinted++ }
	tb.Insert("bad", &tv{Last: 2, failEncode: true})
	for i := range 2 * encodeAhead {
		tb.Insert(fmt.Sprintf("good%d", i), rec{Last: 2, N: uint64(i)}.value())
	}
	if err := s.CommitAsync(Mark{Seen: 1, Resume: 1}); err != nil {
		t.Fatal(err)
	}
	// Wait for the commit's goroutine without settling, so that the
	// slots stay frozen and Get claims them.
	f := s.flight
	landed := <-f.done
	f.done <- landed
	if hinted == 0 {
		t.Fatal("no value was hinted ahead")
	}
	for i := range 2 * encodeAhead {
		sl, err := tb.Get(fmt.Sprintf("good%d", i))
		if err != nil || sl == nil || sl.Value.N != uint64(i) {
			t.Fatalf("good%d after the failed commit: %v, %v", i, sl, err)
		}
	}
	if err := s.Settle(); !errors.Is(err, errEncode) {
		t.Fatalf("settle: %v", err)
	}
}

// TestReadableFollowsTheHand: a frozen slot the commit's goroutine has
// not finished with is not Readable (a hint must not read it), and is once
// the caller has claimed it; a slot that is not frozen always is.
func TestReadableFollowsTheHand(t *testing.T) {
	s := mustOpen(t, Options{FS: vfs.NewMem(), CacheBytes: 1 << 20})
	defer s.Close()
	tb := NewTable(s, "t", 100, decodeTV)
	tb.Insert("bad", &tv{Last: 2, failEncode: true})
	var slots []*Slot[*tv]
	for i := range 2 * encodeAhead {
		slots = append(slots, tb.Insert(fmt.Sprintf("good%d", i), rec{Last: 2, N: uint64(i)}.value()))
	}
	for _, sl := range slots {
		if !tb.Readable(sl) {
			t.Fatalf("%s: not readable with no commit in flight", sl.Key)
		}
	}
	if err := s.CommitAsync(Mark{Seen: 1, Resume: 1}); err != nil {
		t.Fatal(err)
	}
	// The commit fails at "bad", first in line, and gives the slots it
	// holds back: each stays frozen until the caller claims it.
	f := s.flight
	landed := <-f.done
	f.done <- landed
	for i, sl := range slots {
		if tb.Readable(sl) {
			t.Fatalf("%s: readable while frozen and unclaimed", sl.Key)
		}
		if got, err := tb.Get(sl.Key); err != nil || got != sl {
			t.Fatalf("%s: get %v, %v", sl.Key, got, err)
		}
		if !tb.Readable(sl) {
			t.Fatalf("%s: not readable once claimed", sl.Key)
		}
		if i > 0 && !tb.Readable(slots[i-1]) {
			t.Fatalf("%s: claiming the next one made it unreadable", slots[i-1].Key)
		}
	}
	if err := s.Settle(); !errors.Is(err, errEncode) {
		t.Fatalf("settle: %v", err)
	}
}

// TestFailedIsSticky provokes a failed write (a record that refuses to
// encode, at commit and at a dirty eviction) and checks that the store
// then refuses every call that can return an error, that nothing of the
// failed commit is stored, and that a reopen resumes from the last commit.
func TestFailedIsSticky(t *testing.T) {
	for _, at := range []string{"commit", "eviction"} {
		t.Run(at, func(t *testing.T) {
			fs := vfs.NewMem()
			s := mustOpen(t, Options{FS: fs, CacheBytes: 1_000})
			tb := NewTable(s, "t", 100, decodeTV)
			tb.Insert("good", rec{Last: 1, N: 1}.value())
			if err := s.Commit(Mark{Seen: 1, Resume: 1}); err != nil {
				t.Fatal(err)
			}
			tb.Insert("later", rec{Last: 2, N: 1}.value())
			tb.Insert("bad", &tv{Last: 2, failEncode: true})
			if at == "eviction" {
				for i := range 20 {
					tb.Insert(fmt.Sprintf("push%d", i), rec{Last: 3, N: 1, Pad: 100}.value())
				}
				if !errors.Is(s.Err(), ErrFailed) || !errors.Is(s.Err(), errEncode) {
					t.Fatalf("after a failed eviction: %v", s.Err())
				}
			}
			err := s.Commit(Mark{Seen: 2, Resume: 2})
			if !errors.Is(err, ErrFailed) || !errors.Is(err, errEncode) {
				t.Fatalf("commit: %v", err)
			}
			calls := map[string]error{
				"Err":              s.Err(),
				"Commit":           s.Commit(Mark{Seen: 3}),
				"Sweep":            func() error { _, err := s.Sweep(10); return err }(),
				"Get":              func() error { _, err := tb.Get("missing"); return err }(),
				"Delete":           func() error { _, err := tb.Delete("good"); return err }(),
				"SetDefinition":    s.SetDefinition("d", []byte{1}),
				"DeleteDefinition": s.DeleteDefinition("d"),
				"Definitions":      func() error { _, err := s.Definitions(); return err }(),
				"SetTombstone":     s.SetTombstone("t", "x", true),
				"Snapshot":         s.Snapshot("snap"),
				"RebuildExpiry":    tb.RebuildExpiry(),
			}
			for name, err := range calls {
				if !errors.Is(err, ErrFailed) {
					t.Errorf("%s after failure: %v", name, err)
				}
			}
			if err := s.Close(); !errors.Is(err, ErrFailed) {
				t.Fatalf("close after failure: %v", err)
			}
			if _, err := tb.Get("missing"); !errors.Is(err, ErrClosed) {
				t.Fatalf("get after close: %v", err)
			}
			s = mustOpen(t, Options{FS: fs})
			defer s.Close()
			if m := s.Mark(); m.Seen != 1 {
				t.Fatalf("reopened at %+v, want the last commit", m)
			}
			got := storedRecords(t, s.DB(), "t")
			if len(got) != 1 || got["good"] != (rec{Last: 1, N: 1}) {
				t.Fatalf("reopened records %v", got)
			}
		})
	}
}

// TestReadErrorFailsStore injects a read error into the sstables of a
// store and checks that the miss that hits it fails the store with an
// error naming the key, rather than reporting the key absent.
func TestReadErrorFailsStore(t *testing.T) {
	mem := vfs.NewMem()
	s := mustOpen(t, Options{FS: mem})
	tb := NewTable(s, "t", 0, decodeTV)
	for i := range 200 {
		tb.Insert(fmt.Sprintf("k%03d", i), rec{Last: int64(i), N: 1, Pad: 50}.value())
	}
	if err := s.Commit(Mark{Seen: 1}); err != nil {
		t.Fatal(err)
	}
	if err := s.DB().Flush(); err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	toggle := &errorfs.Toggle{Injector: errorfs.InjectorFunc(func(op errorfs.Op) error {
		if op.Kind == errorfs.OpFileReadAt && strings.HasSuffix(op.Path, ".sst") {
			return errorfs.ErrInjected
		}
		return nil
	})}
	s = mustOpen(t, Options{FS: errorfs.Wrap(mem, toggle), BlockCacheBytes: 1})
	defer s.Close()
	tb = NewTable(s, "t", 0, decodeTV)
	toggle.On()
	sl, err := tb.Get("k123")
	toggle.Off()
	if sl != nil || !errors.Is(err, ErrFailed) || !strings.Contains(err.Error(), "k123") {
		t.Fatalf("get with failing reads: %v, %v", sl, err)
	}
	if _, err := tb.Get("k001"); !errors.Is(err, ErrFailed) {
		t.Fatalf("store not failed after a read error: %v", err)
	}
}

func TestDefinitions(t *testing.T) {
	fs := vfs.NewMem()
	s := mustOpen(t, Options{FS: fs})
	for _, d := range []struct{ name, fp string }{{"a.x", "1"}, {"a.y", "2"}, {"b.z", "3"}} {
		if err := s.SetDefinition(d.name, []byte(d.fp)); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.DeleteDefinition("a.y"); err != nil {
		t.Fatal(err)
	}
	want := "map[a.x:[49] b.z:[51]]"
	if got, err := s.Definitions(); err != nil || fmt.Sprint(got) != want {
		t.Fatalf("staged definitions %v %v", got, err)
	}
	if err := s.Commit(Mark{}); err != nil {
		t.Fatal(err)
	}
	if err := s.SetDefinition("uncommitted", nil); err != nil {
		t.Fatal(err)
	}
	s.Close()
	s = mustOpen(t, Options{FS: fs})
	defer s.Close()
	if got, err := s.Definitions(); err != nil || fmt.Sprint(got) != want {
		t.Fatalf("reopened definitions %v %v", got, err)
	}
}

func TestClosed(t *testing.T) {
	s := mustOpen(t, Options{})
	tb := NewTable(s, "t", 0, decodeTV)
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatalf("second close: %v", err)
	}
	if err := s.Commit(Mark{}); !errors.Is(err, ErrClosed) {
		t.Fatalf("commit after close: %v", err)
	}
	if _, err := tb.Get("x"); !errors.Is(err, ErrClosed) {
		t.Fatalf("get after close: %v", err)
	}
	if s.DiskBytes() != 0 {
		t.Fatal("disk bytes after close")
	}
}
