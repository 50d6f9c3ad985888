package store

import (
	"errors"
	"os"
	"sync/atomic"

	"github.com/cockroachdb/pebble/v2/vfs"
)

// errFenced is what every write of a fenced store's filesystem returns.
var errFenced = errors.New("state: store stopped after a fatal storage error; its files are no longer written")

// storeFS is the filesystem a Store hands to Pebble. It does two things
// Pebble has no option for:
//
//   - It never reuses a log file's old contents. Pebble recycles obsolete
//     write-ahead logs by renaming them and writing over them, so until it
//     is overwritten the tail of a reused log still holds old commits,
//     erased keys included. ReuseForWrite here removes the old file and
//     creates a fresh one.
//   - It can be fenced. After Pebble reports a fatal error on the caller's
//     goroutine, the database is left in a state Pebble does not unwind
//     (held references, background jobs); the Store abandons it rather than
//     closing it, fences its filesystem so that nothing it still runs can
//     change the files, and releases the directory lock so the store can be
//     reopened from its last commit in the same process.
type storeFS struct {
	vfs.FS
	fenced atomic.Bool
}

func (f *storeFS) fence() { f.fenced.Store(true) }

func (f *storeFS) check() error {
	if f.fenced.Load() {
		return errFenced
	}
	return nil
}

func (f *storeFS) wrap(file vfs.File, err error) (vfs.File, error) {
	if err != nil {
		return file, err
	}
	return &fencedFile{File: file, fs: f}, nil
}

func (f *storeFS) Create(name string, c vfs.DiskWriteCategory) (vfs.File, error) {
	if err := f.check(); err != nil {
		return nil, err
	}
	return f.wrap(f.FS.Create(name, c))
}

func (f *storeFS) OpenReadWrite(name string, c vfs.DiskWriteCategory, opts ...vfs.OpenOption) (vfs.File, error) {
	if err := f.check(); err != nil {
		return nil, err
	}
	return f.wrap(f.FS.OpenReadWrite(name, c, opts...))
}

func (f *storeFS) ReuseForWrite(oldname, newname string, c vfs.DiskWriteCategory) (vfs.File, error) {
	if err := f.check(); err != nil {
		return nil, err
	}
	if err := f.FS.Remove(oldname); err != nil && !os.IsNotExist(err) {
		return nil, err
	}
	return f.wrap(f.FS.Create(newname, c))
}

func (f *storeFS) Link(oldname, newname string) error {
	if err := f.check(); err != nil {
		return err
	}
	return f.FS.Link(oldname, newname)
}

func (f *storeFS) Remove(name string) error {
	if err := f.check(); err != nil {
		return err
	}
	return f.FS.Remove(name)
}

func (f *storeFS) RemoveAll(name string) error {
	if err := f.check(); err != nil {
		return err
	}
	return f.FS.RemoveAll(name)
}

func (f *storeFS) Rename(oldname, newname string) error {
	if err := f.check(); err != nil {
		return err
	}
	return f.FS.Rename(oldname, newname)
}

func (f *storeFS) MkdirAll(dir string, perm os.FileMode) error {
	if err := f.check(); err != nil {
		return err
	}
	return f.FS.MkdirAll(dir, perm)
}

// Unwrap gives Pebble's helpers that look through wrappers the real
// filesystem.
func (f *storeFS) Unwrap() vfs.FS { return f.FS }

type fencedFile struct {
	vfs.File
	fs *storeFS
}

func (f *fencedFile) Write(p []byte) (int, error) {
	if err := f.fs.check(); err != nil {
		return 0, err
	}
	return f.File.Write(p)
}

func (f *fencedFile) WriteAt(p []byte, off int64) (int, error) {
	if err := f.fs.check(); err != nil {
		return 0, err
	}
	return f.File.WriteAt(p, off)
}

func (f *fencedFile) Sync() error {
	if err := f.fs.check(); err != nil {
		return err
	}
	return f.File.Sync()
}

func (f *fencedFile) SyncData() error {
	if err := f.fs.check(); err != nil {
		return err
	}
	return f.File.SyncData()
}

func (f *fencedFile) SyncTo(length int64) (bool, error) {
	if err := f.fs.check(); err != nil {
		return false, err
	}
	return f.File.SyncTo(length)
}

func (f *fencedFile) Preallocate(off, length int64) error {
	if err := f.fs.check(); err != nil {
		return err
	}
	return f.File.Preallocate(off, length)
}
