package scaleout

import (
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"

	"github.com/tallyward/tallyward"
)

// ErrNoSnapshot is returned by Snapshots.Load when no snapshot of the
// partition was saved at the asked offset.
var ErrNoSnapshot = errors.New("scaleout: no snapshot at that offset")

// Snapshots is the shared storage that carries a partition's state from
// one instance to the next. A snapshot is named by its partition and by
// its head: the offset of the first record it has not consumed, which is
// the group offset committed with it.
//
// Implementations must make Save atomic (a snapshot is either whole under
// its name or absent) and must be safe for concurrent use by several
// instances: each instance only writes the partitions it owns, but two
// owners of one partition may briefly overlap during a rebalance, and
// then write the same name with the same content.
type Snapshots interface {
	// Save stores a snapshot of part at head. write is called with a
	// local directory that does not exist yet and creates the snapshot
	// there (Pipeline.Snapshot). A snapshot already saved under the same
	// name is replaced.
	Save(ctx context.Context, part Partition, head int64, write func(dir string) error) error
	// Load copies the snapshot of part at head into dst, a local
	// directory that must not exist. It returns an error wrapping
	// ErrNoSnapshot when there is none.
	Load(ctx context.Context, part Partition, head int64, dst string) error
	// Prune removes the snapshots of part whose head is below keep.
	Prune(ctx context.Context, part Partition, keep int64) error
}

// Partition names one partition of a topic.
type Partition struct {
	Topic     string
	Partition int32
}

func (p Partition) String() string { return fmt.Sprintf("%s/%d", p.Topic, p.Partition) }

// DirSnapshots keeps snapshots in a directory: a shared volume in
// production, a temporary directory in tests. Layout:
// Root/<topic>/<partition>/<head, 20 digits>/ holds one snapshot, as
// written by Pipeline.Snapshot. A save is written under a temporary name
// in the same directory and renamed into place, so a reader never sees
// half of one.
type DirSnapshots struct {
	Root string
}

func (d DirSnapshots) partDir(p Partition) string {
	return filepath.Join(d.Root, p.Topic, strconv.Itoa(int(p.Partition)))
}

func (d DirSnapshots) name(p Partition, head int64) string {
	return filepath.Join(d.partDir(p), fmt.Sprintf("%020d", head))
}

// Save implements Snapshots.
func (d DirSnapshots) Save(ctx context.Context, p Partition, head int64, write func(dir string) error) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	if err := os.MkdirAll(d.partDir(p), 0o755); err != nil {
		return err
	}
	tmp, err := os.MkdirTemp(d.partDir(p), ".saving-")
	if err != nil {
		return err
	}
	defer os.RemoveAll(tmp)
	snap := filepath.Join(tmp, "snap")
	if err := write(snap); err != nil {
		return fmt.Errorf("scaleout: snapshot of %s at %d: %w", p, head, err)
	}
	final := d.name(p, head)
	if err := os.RemoveAll(final); err != nil {
		return err
	}
	return os.Rename(snap, final)
}

// Load implements Snapshots.
func (d DirSnapshots) Load(ctx context.Context, p Partition, head int64, dst string) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	src := d.name(p, head)
	if _, err := os.Stat(src); errors.Is(err, os.ErrNotExist) {
		return fmt.Errorf("%w: %s at %d", ErrNoSnapshot, p, head)
	}
	return tallyward.CopySnapshot(src, dst)
}

// Prune implements Snapshots.
func (d DirSnapshots) Prune(ctx context.Context, p Partition, keep int64) error {
	ents, err := os.ReadDir(d.partDir(p))
	if errors.Is(err, os.ErrNotExist) {
		return nil
	}
	if err != nil {
		return err
	}
	var errs []error
	for _, e := range ents {
		if strings.HasPrefix(e.Name(), ".") {
			continue
		}
		h, err := strconv.ParseInt(e.Name(), 10, 64)
		if err != nil || h >= keep {
			continue
		}
		errs = append(errs, os.RemoveAll(filepath.Join(d.partDir(p), e.Name())))
	}
	return errors.Join(errs...)
}

// Heads lists the heads of the snapshots kept for p, in increasing order
// (for tests and inspection).
func (d DirSnapshots) Heads(p Partition) ([]int64, error) {
	ents, err := os.ReadDir(d.partDir(p))
	if errors.Is(err, os.ErrNotExist) {
		return nil, nil
	}
	if err != nil {
		return nil, err
	}
	var hs []int64
	for _, e := range ents {
		if h, err := strconv.ParseInt(e.Name(), 10, 64); err == nil {
			hs = append(hs, h)
		}
	}
	return hs, nil
}
