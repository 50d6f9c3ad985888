package scaleout

import (
	"bytes"
	"context"
	"errors"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/tallyward/tallyward"
)

var updateGolden = os.Getenv("SCALEOUT_UPDATE_GOLDEN") != ""

// The cursor is stored with every partition's state: its version 1 blob
// stays readable for good.
func TestCursorGolden(t *testing.T) {
	c := cursor{resume: 1234, head: 1300}
	path := filepath.Join("testdata", "cursor-v1.bin")
	if updateGolden {
		if err := os.WriteFile(path, c.encode(), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	blob, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	got, err := decodeCursor(blob)
	if err != nil || got != c {
		t.Fatalf("golden cursor decodes to %+v, %v; want %+v", got, err, c)
	}
	if !bytes.Equal(c.encode(), blob) {
		t.Fatalf("version 1 encoding changed: %x, golden %x", c.encode(), blob)
	}
	for _, bad := range [][]byte{nil, {2, 0, 0}, {1}, {1, 5}, {1, 5, 4}, {1, 1, 2, 0}, {1, 0x80}} {
		if _, err := decodeCursor(bad); !errors.Is(err, ErrCursor) {
			t.Errorf("decodeCursor(%x) = %v, want ErrCursor", bad, err)
		}
	}
}

// FuzzCursor: no input panics; an accepted one re-encodes to itself.
func FuzzCursor(f *testing.F) {
	f.Add(cursor{resume: 0, head: 0}.encode())
	f.Add(cursor{resume: 1 << 40, head: 1<<40 + 9}.encode())
	f.Add([]byte{1, 0x80, 0x80})
	f.Fuzz(func(t *testing.T, b []byte) {
		c, err := decodeCursor(b)
		if err != nil {
			if !errors.Is(err, ErrCursor) {
				t.Fatalf("undocumented error %v", err)
			}
			return
		}
		if c.resume > c.head || !bytes.Equal(c.encode(), b) {
			t.Fatalf("accepted %x as %+v, which re-encodes to %x", b, c, c.encode())
		}
	})
}

func TestDirSnapshots(t *testing.T) {
	ctx := context.Background()
	d := DirSnapshots{Root: t.TempDir()}
	part := Partition{"payments", 3}
	spec := accountSpec()
	spec.Emit = func(tallyward.Row[payment]) {}
	opts := pipelineOptions()
	opts.Dir = filepath.Join(t.TempDir(), "live")
	p, err := tallyward.Open(spec, opts)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	evs := payments(3, 50, 10, 10)
	for i, e := range evs {
		if err := p.Process(e); err != nil {
			t.Fatal(err)
		}
		if i == 19 || i == 49 {
			if err := d.Save(ctx, part, int64(i+1), p.Snapshot); err != nil {
				t.Fatal(err)
			}
		}
	}
	if err := d.Save(ctx, part, 99, func(string) error { return errors.New("disk full") }); err == nil {
		t.Fatal("a failed write was saved")
	}
	if hs, _ := d.Heads(part); !slices.Equal(hs, []int64{20, 50}) {
		t.Fatalf("heads %v, want [20 50] (a failed save leaves nothing)", hs)
	}
	if err := d.Load(ctx, part, 21, filepath.Join(t.TempDir(), "x")); !errors.Is(err, ErrNoSnapshot) {
		t.Fatalf("loading a missing head: %v", err)
	}
	dst := filepath.Join(t.TempDir(), "copy")
	if err := d.Load(ctx, part, 50, dst); err != nil {
		t.Fatal(err)
	}
	opts.Dir = dst
	q, err := tallyward.Open(spec, opts)
	if err != nil {
		t.Fatal(err)
	}
	if q.ResumeSeq() != 50 {
		t.Errorf("the loaded copy resumes at %d, want 50", q.ResumeSeq())
	}
	q.Close()
	if err := d.Prune(ctx, part, 50); err != nil {
		t.Fatal(err)
	}
	if hs, _ := d.Heads(part); !slices.Equal(hs, []int64{50}) {
		t.Fatalf("after pruning below 50: %v", hs)
	}
}

func TestConfigValidateReportsAll(t *testing.T) {
	var c Config[payment]
	c.OutputTopic = "rows"
	c.Options.Dir = "/x"
	err := c.Validate()
	if !errors.Is(err, ErrConfig) {
		t.Fatalf("%v", err)
	}
	for _, want := range []string{"Brokers", "Group", "Topic", "Decode", "Spec.Time", "Dir is empty", "Snapshots", "Encode", "Options.Dir"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("Validate does not mention %s: %v", want, err)
		}
	}
	var r RekeyConfig
	if err := r.Validate(); !errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), "TransactionalID") {
		t.Errorf("RekeyConfig.Validate: %v", err)
	}
}

// A group offset that names no snapshot (the shared storage lost) stops
// the member that is given the partition rather than start it empty.
func TestNoSnapshotStopsTheMember(t *testing.T) {
	evs := payments(17, 600, 50, 50)
	cl := newCluster(t, 2)
	rd := cl.follow(cl.out)
	a := cl.start("a")
	cl.produce(evs, byAccount)
	rd.waitFor(t, "every row", 2*time.Minute, func(d, _ int, _ bool) bool { return d == len(evs) })
	a.stop(t)
	if err := os.RemoveAll(cl.snaps.Root); err != nil {
		t.Fatal(err)
	}
	b := cl.start("b")
	select {
	case err := <-b.done:
		if !errors.Is(err, ErrNoSnapshot) {
			t.Fatalf("run ended with %v, want ErrNoSnapshot", err)
		}
	case <-time.After(time.Minute):
		t.Fatal("the member ran on without its partitions' state")
	}
	b.cancel()
	b.m.Close(context.Background())
}
