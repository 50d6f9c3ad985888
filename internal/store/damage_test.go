package store

import (
	"bufio"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"sync/atomic"
	"syscall"
	"testing"

	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/cockroachdb/pebble/v2/vfs/errorfs"
)

// tableStore writes n records and the Mark in one commit and flushes them
// into a table; it returns the filesystem and the table's name.
func tableStore(t *testing.T, n int) (*vfs.MemFS, string) {
	fs := vfs.NewMem()
	s := mustOpen(t, Options{FS: fs, Dir: "db"})
	tb := NewTable(s, "t", 0, decodeTV)
	for i := range n {
		tb.Insert(fmt.Sprintf("k%05d", i), rec{Last: int64(i), N: uint64(i), Pad: 20}.value())
	}
	if err := s.Commit(Mark{Seen: 1, Resume: 1}); err != nil {
		t.Fatal(err)
	}
	if err := s.DB().Flush(); err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	ls, _ := fs.List("db")
	var tables []string
	for _, n := range ls {
		if strings.HasSuffix(n, ".sst") {
			tables = append(tables, n)
		}
	}
	if len(tables) != 1 {
		t.Fatalf("tables: %v", tables)
	}
	return fs, tables[0]
}

func flipByte(t *testing.T, fs vfs.FS, path string, pos int64) {
	f, err := fs.OpenReadWrite(path, vfs.WriteCategoryUnspecified)
	if err != nil {
		t.Fatal(err)
	}
	var b [1]byte
	if _, err := f.ReadAt(b[:], pos); err != nil {
		t.Fatal(err)
	}
	b[0] ^= 0x5a
	if _, err := f.WriteAt(b[:], pos); err != nil {
		t.Fatal(err)
	}
	f.Close()
}

// A flipped byte in a table used to panic: at the start of the file Open
// panicked on Pebble's leaked references, in the middle the read error was
// clear but Close panicked, in the footer a background goroutine ended the
// process with an unreadable panic. Each must now be an error wrapping
// ErrDamaged that names the file, from Open or from the read, a Close that
// returns, and a store the same process can open again.
func TestTableDamageIsAnError(t *testing.T) {
	tmpl, table := tableStore(t, 5_000)
	st, err := tmpl.Stat("db/" + table)
	if err != nil {
		t.Fatal(err)
	}
	for _, pos := range []int64{20, st.Size() / 2, st.Size() - 20, st.Size() - 60} {
		t.Run(fmt.Sprint(pos), func(t *testing.T) {
			fs := vfs.NewMem()
			if _, err := vfs.Clone(tmpl, fs, "db", "db"); err != nil {
				t.Fatal(err)
			}
			flipByte(t, fs, "db/"+table, pos)
			s, err := Open(Options{FS: fs, Dir: "db"})
			if err != nil {
				checkDamage(t, err, table)
				return
			}
			var readErr error
			tb := NewTable(s, "t", 0, decodeTV)
			for i := range 5_000 {
				if _, readErr = tb.Get(fmt.Sprintf("k%05d", i)); readErr != nil {
					break
				}
			}
			if readErr == nil {
				_, readErr = s.CountRecords()
			}
			if readErr == nil {
				readErr = s.Err()
			}
			checkDamage(t, readErr, table)
			if err := s.Close(); !errors.Is(err, ErrDamaged) {
				t.Fatalf("close: %v", err)
			}
			// The directory is free again.
			s2, err := Open(Options{FS: fs, Dir: "db", ReadOnly: true})
			if err != nil {
				checkDamage(t, err, table)
				return
			}
			s2.Close()
		})
	}
}

func checkDamage(t *testing.T, err error, file string) {
	t.Helper()
	if !errors.Is(err, ErrDamaged) || !strings.Contains(err.Error(), strings.TrimSuffix(file, ".sst")) {
		t.Fatalf("want an ErrDamaged naming %s, got %v", file, err)
	}
}

// logWriteFault fails every write to a log file once armed.
type logWriteFault struct{ armed atomic.Bool }

func (f *logWriteFault) MaybeError(op errorfs.Op) error {
	if f.armed.Load() && strings.HasSuffix(op.Path, ".log") && (op.Kind == errorfs.OpFileWrite || op.Kind == errorfs.OpFileWriteAt) {
		return errorfs.ErrInjected
	}
	return nil
}

func (f *logWriteFault) String() string { return "logWriteFault" }

// A failed log write inside a commit is fatal to Pebble (it cannot unwind
// the commit pipeline). The commit returns the error, Close returns
// instead of panicking on the abandoned database's references, nothing
// can write the files any more, and the same process reopens the store at
// its last commit.
func TestFatalInsideCommitIsAnError(t *testing.T) {
	mem := vfs.NewMem()
	fault := &logWriteFault{}
	s := mustOpen(t, Options{FS: errorfs.Wrap(mem, fault), Dir: "db", IngestThreshold: -1})
	tb := NewTable(s, "t", 0, decodeTV)
	tb.Insert("a", rec{Last: 1, N: 1}.value())
	if err := s.Commit(Mark{Seen: 1, Resume: 1}); err != nil {
		t.Fatal(err)
	}
	fault.armed.Store(true)
	tb.Insert("b", rec{Last: 2, N: 2}.value())
	err := s.Commit(Mark{Seen: 2, Resume: 2})
	if !errors.Is(err, ErrFailed) || !strings.Contains(err.Error(), "injected") {
		t.Fatalf("commit: %v", err)
	}
	if !s.abandoned {
		t.Skip("this Pebble version returned the log error without a fatal; nothing to abandon")
	}
	if err := s.Close(); !errors.Is(err, ErrFailed) {
		t.Fatalf("close: %v", err)
	}
	s2 := mustOpen(t, Options{FS: mem, Dir: "db"})
	defer s2.Close()
	if s2.Mark().Seen != 1 {
		t.Fatalf("reopened at %+v, want the first commit", s2.Mark())
	}
	if got := storedRecords(t, s2.DB(), "t"); len(got) != 1 {
		t.Fatalf("records %v", got)
	}
}

// A directory of unrelated files is not made into a store; a locked one
// says so; a store still opens in an empty or missing directory.
func TestOpenRefusesForeignAndLockedDirectories(t *testing.T) {
	dir := t.TempDir()
	if err := os.WriteFile(filepath.Join(dir, "notes.txt"), []byte("mine"), 0o644); err != nil {
		t.Fatal(err)
	}
	if _, err := Open(Options{Dir: dir}); !errors.Is(err, ErrNotStore) || !strings.Contains(err.Error(), "notes.txt") {
		t.Fatalf("foreign directory: %v", err)
	}
	if ls, _ := os.ReadDir(dir); len(ls) != 1 {
		t.Fatalf("open left files: %v", ls)
	}

	dir = filepath.Join(t.TempDir(), "new")
	s := mustOpen(t, Options{Dir: dir})
	if _, err := Open(Options{Dir: dir}); !errors.Is(err, ErrLocked) {
		t.Fatalf("second open: %v", err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	s = mustOpen(t, Options{Dir: dir})
	s.Close()
}

// The lock message names another process when one holds it: a child
// process holds the store while this one opens it.
func TestLockedByAnotherProcess(t *testing.T) {
	if dir := os.Getenv("TALLYWARD_HOLD_STORE"); dir != "" {
		s := mustOpen(t, Options{Dir: dir})
		defer s.Close()
		fmt.Println("HOLDING")
		os.Stdin.Read(make([]byte, 1)) // until the parent closes our stdin
		return
	}
	if testing.Short() {
		t.Skip("spawns a child process")
	}
	dir := t.TempDir()
	child := holdStore(t, dir)
	defer child()
	_, err := Open(Options{Dir: dir})
	if !errors.Is(err, ErrLocked) || !errors.Is(err, syscall.EAGAIN) && !strings.Contains(err.Error(), "another process") {
		t.Fatalf("open of a store another process holds: %v", err)
	}
	if !strings.Contains(err.Error(), "another process") {
		t.Fatalf("message does not name another process: %v", err)
	}
	if _, err := Open(Options{Dir: dir, ReadOnly: true}); !errors.Is(err, ErrLocked) {
		t.Fatalf("read-only open of a store another process holds: %v", err)
	}
}

// Erase's promise at the store level: after a key's record is deleted
// (committed or not), the store is fully compacted and closed, no file in
// its directory holds the key's bytes, recycled logs included.
func TestDeletedKeyLeavesNoBytes(t *testing.T) {
	const victim = "victim-4e1d-plaintext"
	for _, committedFirst := range []bool{true, false} {
		t.Run(fmt.Sprint("committed=", committedFirst), func(t *testing.T) {
			dir := t.TempDir()
			s := mustOpen(t, Options{Dir: dir, CacheBytes: 4 << 10, MemTableBytes: 256 << 10, IngestThreshold: 200})
			tb := NewTable(s, "t", 0, decodeTV)
			seen := uint64(0)
			commit := func() {
				seen++
				if err := s.Commit(Mark{Seen: seen, Resume: seen}); err != nil {
					t.Fatal(err)
				}
			}
			tb.Insert(victim, rec{Last: 1, N: 1, Pad: 10}.value())
			// Enough other records to evict the victim into the pending
			// batch and to rotate logs several times.
			for i := range 3000 {
				tb.Insert(fmt.Sprintf("other-%05d", i), rec{Last: 1, N: 1, Pad: 100}.value())
				if committedFirst && i%100 == 99 {
					commit()
				}
			}
			if _, err := tb.Delete(victim); err != nil {
				t.Fatal(err)
			}
			commit()
			for i := range 3000 {
				tb.Insert(fmt.Sprintf("later-%05d", i), rec{Last: 2, N: 1, Pad: 100}.value())
				if i%100 == 99 {
					commit()
				}
			}
			if err := s.Compact(); err != nil {
				t.Fatal(err)
			}
			if err := s.Close(); err != nil {
				t.Fatal(err)
			}
			ls, err := os.ReadDir(dir)
			if err != nil {
				t.Fatal(err)
			}
			var names []string
			for _, e := range ls {
				names = append(names, e.Name())
				b, err := os.ReadFile(filepath.Join(dir, e.Name()))
				if err != nil {
					t.Fatal(err)
				}
				if strings.Contains(string(b), victim) {
					t.Errorf("%s holds the deleted key", e.Name())
				}
			}
			slices.Sort(names)
			t.Logf("files: %v", names)
		})
	}
}

// holdStore starts a child process that opens the store in dir and holds
// it until the returned function ends it.
func holdStore(t *testing.T, dir string) func() {
	cmd := exec.Command(os.Args[0], "-test.run=^TestLockedByAnotherProcess$", "-test.count=1")
	cmd.Env = append(os.Environ(), "TALLYWARD_HOLD_STORE="+dir)
	stdin, err := cmd.StdinPipe()
	if err != nil {
		t.Fatal(err)
	}
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	sc := bufio.NewScanner(stdout)
	for sc.Scan() && sc.Text() != "HOLDING" {
	}
	return func() {
		stdin.Close()
		cmd.Wait()
	}
}

// A Pebble fatal error on one of its own goroutines cannot be recovered;
// the process must end with a message a person can read (the store's
// directory and the error), not an unreadable panic value. (Inside a call
// of the store the same fatal error is returned: see
// TestFatalInsideCommitIsAnError.)
func TestFatalOnBackgroundGoroutineIsReadable(t *testing.T) {
	if os.Getenv("TALLYWARD_FATAL_CHILD") != "" {
		l := &logger{dir: "some/store"}
		done := make(chan struct{})
		go func() {
			l.Fatalf("MANIFEST sync failed: %v", syscall.ENOSPC)
			close(done)
		}()
		<-done
		t.Fatal("Fatalf returned on a background goroutine")
	}
	cmd := exec.Command(os.Args[0], "-test.run=^TestFatalOnBackgroundGoroutineIsReadable$", "-test.count=1")
	cmd.Env = append(os.Environ(), "TALLYWARD_FATAL_CHILD=1")
	out, err := cmd.CombinedOutput()
	var ee *exec.ExitError
	if !errors.As(err, &ee) || ee.ExitCode() != FatalExitCode {
		t.Fatalf("child: %v\n%s", err, out)
	}
	if !strings.Contains(string(out), `fatal storage error in store "some/store"`) || !strings.Contains(string(out), "no space left on device") {
		t.Fatalf("message:\n%s", out)
	}
}
