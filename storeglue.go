package tallyward

import (
	"errors"
	"fmt"
	"log/slog"

	"github.com/tallyward/tallyward/internal/store"
)

// Errors about the store's files, returned by Open (wrapped with the file
// or directory concerned; test with errors.Is).
var (
	// ErrStoreDamaged: the store's files do not hold what was committed (a
	// damaged MANIFEST or table, or fewer entity records readable than the
	// last commit recorded). Open refuses such a store rather than resume
	// with state silently missing; Options.ReadOnly opens it for
	// inspection or salvage, with the damage in Notices. A read that finds
	// a damaged table later returns it too, naming the file.
	ErrStoreDamaged = store.ErrDamaged
	// ErrStoreLocked: another process (or another open Pipeline in this
	// process) holds the store.
	ErrStoreLocked = store.ErrLocked
	// ErrNotStore: Options.Dir is a non-empty directory that holds no
	// store; Open does not create one among unrelated files.
	ErrNotStore = store.ErrNotStore
	// ErrNoSpace: the disk has no room to open the store (its log must be
	// replayed into tables) or to keep writing. Free space and reopen; the
	// store resumes from its last commit.
	ErrNoSpace = store.ErrNoSpace
	// ErrReadOnly is returned by Commit on a pipeline opened with
	// Options.ReadOnly.
	ErrReadOnly = store.ErrReadOnly
)

// StoreFatalExitCode is the exit code of a process the storage engine had
// to stop: a fatal storage error (a failed write of the store's table list
// on a full disk, say) on one of the engine's background goroutines, which
// nothing can recover. The process first prints the error and the store's
// directory on standard error; reopening resumes from the last commit. A
// fatal error inside a call returns an error instead.
const StoreFatalExitCode = store.FatalExitCode

func openStore(opts Options) (*store.Store, error) {
	so := store.Options{
		Dir: opts.Dir, FS: opts.FS, CacheBytes: opts.CacheBytes, IngestThreshold: opts.IngestThreshold,
		BlockCacheBytes: opts.BlockCacheBytes, MemTableBytes: opts.MemTableBytes, ReadOnly: opts.ReadOnly,
	}
	// The default logger discards: leave the store's own quiet default
	// rather than format every Pebble message for nothing.
	if opts.Logger != nil && opts.Logger.Handler() != slog.DiscardHandler {
		so.Logger = store.SlogLogger(opts.Logger)
	}
	return store.Open(so)
}

// checkStored compares the readable store with the progress of its last
// commit: every entity record the commit counted must be readable. A lost
// table (damage Pebble itself does not notice) shows here as missing
// records. It costs a scan of the record keys (about a second per ten
// million entities).
func (p *Pipeline[E]) checkStored() error {
	if len(p.store.Mark().Extra) == 0 {
		return nil
	}
	n, err := p.store.CountRecords()
	if err != nil {
		return err
	}
	if n != p.c.live {
		return p.store.Damaged(fmt.Sprintf("the last commit recorded %d entity records, %d are readable", p.c.live, n))
	}
	return nil
}

// Compact rewrites the whole store into its last level and starts a new
// write-ahead log, so that erased and expired records and their deletion
// markers leave its files. After Erase, Compact and Close, no file in
// Options.Dir holds the erased key's bytes (files are deleted, not
// overwritten: the filesystem may keep freed blocks). It costs a read and
// write of the whole store and stalls the caller meanwhile; run it after
// erasures, not routinely.
func (p *Pipeline[E]) Compact() error {
	if err := p.usable(); err != nil {
		return err
	}
	if err := p.finishWork(); err != nil {
		return err
	}
	if err := p.store.Compact(); err != nil && !errors.Is(err, store.ErrReadOnly) {
		p.err = err
		return err
	} else if err != nil {
		return err
	}
	return nil
}
