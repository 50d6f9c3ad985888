package store

import (
	"encoding/binary"
	"fmt"

	"github.com/cockroachdb/pebble/v2"
)

// More key tags (frozen numbers, see the package doc):
//
//	0x06 part        0x06 | uvarint len(part) | part | part key -> part value
//
// A part is state that a component layered on the pipeline (a join) keeps
// beside the entity records: its own key space, written by the same
// commits, so a restart sees the part and the records at one cut. Part
// names share no space with table names (they sit under another tag).
const tagPart byte = 0x06

// Part is the state of one such component. The store calls Stage during
// every Commit, on the caller's goroutine, before the commit is written:
// the part writes every change made since the last commit through w, and
// may make its own output durable first (what it emitted must not be lost
// once the commit that covers it is written).
type Part interface {
	Stage(w *PartWriter) error
}

// PartWriter writes one part's keys into the commit being built.
type PartWriter struct {
	w      writer
	prefix []byte
	buf    []byte
}

// Set stages key = value.
func (pw *PartWriter) Set(key, value []byte) error {
	pw.buf = append(append(pw.buf[:0], pw.prefix...), key...)
	return pw.w.Set(pw.buf, value, nil)
}

// Delete stages the removal of key.
func (pw *PartWriter) Delete(key []byte) error {
	pw.buf = append(append(pw.buf[:0], pw.prefix...), key...)
	return pw.w.Delete(pw.buf, nil)
}

func partPrefix(name string) []byte {
	p := []byte{tagPart}
	p = binary.AppendUvarint(p, uint64(len(name)))
	return append(p, name...)
}

// partFlusher adapts a Part to the commit's two halves: the part is not
// safe for concurrent use, so all of its work happens in the freeze, on
// the caller's goroutine, straight into the commit (through the cut's
// writer: part keys are not records, so they go to the collector); the half
// on the commit goroutine has nothing left to do.
type partFlusher struct {
	name string
	part Part
	pw   PartWriter
}

func (f *partFlusher) freezeDirty(b writer, _ int64) (int, error) {
	f.pw.w = b
	defer func() { f.pw.w = nil }()
	if err := f.part.Stage(&f.pw); err != nil {
		return 0, fmt.Errorf("state: part %q: %w", f.name, err)
	}
	return 0, nil
}

func (f *partFlusher) encodeFrozen(*collector, uint64, int64, *removedKeys) (int, error) {
	return 0, nil
}

// AddPart registers p under name; every later Commit stages it. A name
// may be registered once per Store.
func (s *Store) AddPart(name string, p Part) error {
	if err := s.check(); err != nil {
		return err
	}
	for _, t := range s.tables {
		if f, ok := t.(*partFlusher); ok && f.name == name {
			return fmt.Errorf("state: part %q registered twice", name)
		}
	}
	s.tables = append(s.tables, &partFlusher{name: name, part: p, pw: PartWriter{prefix: partPrefix(name)}})
	return nil
}

// ScanPart calls fn with every committed key of part name, in key order,
// without the part prefix, after waiting for a commit in flight. fn must
// not retain its arguments.
func (s *Store) ScanPart(name string, fn func(key, value []byte) error) error {
	if err := s.Settle(); err != nil {
		return err
	}
	prefix := partPrefix(name)
	it, err := s.pending.NewIter(&pebble.IterOptions{LowerBound: prefix, UpperBound: prefixEnd(prefix)})
	if err != nil {
		return s.fail(err)
	}
	for ok := it.First(); ok; ok = it.Next() {
		if err := fn(it.Key()[len(prefix):], it.Value()); err != nil {
			it.Close()
			return fmt.Errorf("state: part %q key %q: %w", name, it.Key(), err)
		}
	}
	if err := it.Close(); err != nil {
		return s.fail(err)
	}
	return nil
}
