package store

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"
)

// mountSmallDisk mounts a tmpfs of size bytes on a new directory, or skips
// the test where the machine does not allow it.
func mountSmallDisk(t *testing.T, size int) string {
	dir := t.TempDir()
	out, err := exec.Command("mount", "-t", "tmpfs", "-o", fmt.Sprintf("size=%d", size), "tmpfs", dir).CombinedOutput()
	if err != nil {
		t.Skipf("cannot mount a small tmpfs to fill (needs root): %v %s", err, out)
	}
	t.Cleanup(func() { exec.Command("umount", dir).Run() })
	return dir
}

// fullDiskStep runs one step of TestFullDisk in a child process and returns
// its output; a child that dies or hangs fails the test, except that a
// fill step may end with the storage engine's own fatal exit (see below).
func fullDiskStep(t *testing.T, dir, step string) string {
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	cmd := exec.CommandContext(ctx, os.Args[0], "-test.run=^TestFullDiskChild$", "-test.count=1", "-test.v")
	cmd.Env = append(os.Environ(), "TALLYWARD_FULL_DISK="+dir+"|"+step)
	out, err := cmd.CombinedOutput()
	if ctx.Err() != nil {
		t.Fatalf("step %s hung (killed after 60s):\n%s", step, out)
	}
	var ee *exec.ExitError
	if errors.As(err, &ee) && ee.ExitCode() == FatalExitCode && strings.HasPrefix(step, "fill-") &&
		strings.Contains(string(out), "no space left") && strings.Contains(string(out), dir) {
		// Pebble's own background work (a flush or compaction writing
		// its MANIFEST) found the disk full: that is fatal to the storage
		// engine by design. What the store promises then is a readable
		// message naming the store and the cause, and a reopen that
		// resumes from the last commit, which the caller checks next.
		t.Logf("step %s: the storage engine stopped the process, readably:\n%s", step, out)
		return string(out)
	}
	if err != nil {
		t.Fatalf("step %s: child failed: %v\n%s", step, err, out)
	}
	return string(out)
}

// lastCommitted is the RESULT of a fill step, or, if the process was
// stopped before it could print one, the last commit it reported.
func lastCommitted(out string) string {
	if r := result(out); r != "" {
		return r
	}
	last := ""
	for _, l := range strings.Split(out, "\n") {
		if c, ok := strings.CutPrefix(l, "COMMITTED "); ok {
			last = c
		}
	}
	return last
}

// result extracts "RESULT <text>" from a child's output.
func result(out string) string {
	for _, l := range strings.Split(out, "\n") {
		if r, ok := strings.CutPrefix(l, "RESULT "); ok {
			return r
		}
	}
	return ""
}

// A full disk while running gives a clear, permanent error and keeps the
// last commit; reopening on the still-full disk gives a clear error at
// once (it used to spin at full CPU, Pebble retrying a flush forever, or
// end the process with an unreadable panic after a large commit); after
// space is freed the store reopens at its last commit with its records.
// Each step runs in a child process so that a hang or a process exit is
// seen as such.
func TestFullDisk(t *testing.T) {
	if testing.Short() {
		t.Skip("mounts a filesystem and spawns child processes")
	}
	for _, large := range []bool{false, true} {
		t.Run(fmt.Sprint("large=", large), func(t *testing.T) {
			disk := mountSmallDisk(t, 16<<20)
			// Leave about 3 MiB: the first commits fit, later ones do not.
			filler := filepath.Join(disk, "filler")
			if err := os.WriteFile(filler, make([]byte, 13<<20), 0o644); err != nil {
				t.Fatal(err)
			}
			kind := "small"
			if large {
				kind = "large"
			}
			out := fullDiskStep(t, disk, "fill-"+kind)
			last, err := strconv.ParseUint(lastCommitted(out), 10, 64)
			if err != nil || last == 0 {
				t.Fatalf("fill: no commit before the disk filled:\n%s", out)
			}
			if !strings.Contains(out, "no space left") {
				t.Fatalf("fill: the failure does not say the disk is full:\n%s", out)
			}
			out = fullDiskStep(t, disk, "reopen")
			if r := result(out); r != "refused" && r != fmt.Sprint(last) {
				t.Fatalf("reopen on a full disk: %q\n%s", r, out)
			}
			t.Logf("reopen on the full disk:\n%s", out)
			if err := os.Remove(filler); err != nil {
				t.Fatal(err)
			}
			out = fullDiskStep(t, disk, "reopen")
			if r := result(out); r != fmt.Sprint(last) {
				t.Fatalf("reopen after freeing space: %q, want mark %d\n%s", r, last, out)
			}
		})
	}
}

// TestFullDiskChild is the child side of TestFullDisk.
func TestFullDiskChild(t *testing.T) {
	env := os.Getenv("TALLYWARD_FULL_DISK")
	if env == "" {
		t.Skip("child of TestFullDisk only")
	}
	disk, step, _ := strings.Cut(env, "|")
	dir := filepath.Join(disk, "db")
	switch step {
	case "fill-small", "fill-large":
		opts := Options{Dir: dir, MemTableBytes: 1 << 20}
		n := 200 // records per commit: batch commits
		if step == "fill-large" {
			opts.IngestThreshold, n = 1000, 5000 // ingested tables
		}
		s := mustOpen(t, opts)
		tb := NewTable(s, "t", 0, decodeTV)
		var last uint64
		for c := uint64(1); ; c++ {
			for i := range n {
				k := fmt.Sprintf("k%07d", int(c)*n+i)
				tb.Insert(k, rec{Last: int64(c), N: c, Pad: 200}.value())
			}
			err := s.Commit(Mark{Seen: c, Resume: c})
			if err == nil {
				last = c
				fmt.Printf("COMMITTED %d\n", c)
				continue
			}
			fmt.Printf("commit %d failed: %v\n", c, err)
			if !errors.Is(err, ErrFailed) {
				t.Fatalf("not a store failure: %v", err)
			}
			if err2 := s.Commit(Mark{Seen: c, Resume: c}); err2 == nil {
				t.Fatal("a failed store committed again")
			}
			break
		}
		fmt.Printf("close: %v\n", s.Close())
		fmt.Printf("RESULT %d\n", last)
	case "reopen":
		s, err := Open(Options{Dir: dir})
		if err != nil {
			fmt.Printf("open: %v\n", err)
			if !errors.Is(err, ErrNoSpace) {
				t.Fatalf("reopen error does not say the disk is full: %v", err)
			}
			fmt.Println("RESULT refused")
			return
		}
		defer s.Close()
		m := s.Mark()
		recs := storedRecords(t, s.DB(), "t")
		for k, r := range recs {
			if r.N > m.Seen || !bytes.HasPrefix([]byte(k), []byte("k")) {
				t.Fatalf("record %s of commit %d after the mark %d", k, r.N, m.Seen)
			}
		}
		fmt.Printf("%d records\n", len(recs))
		fmt.Printf("RESULT %d\n", m.Seen)
	}
}
