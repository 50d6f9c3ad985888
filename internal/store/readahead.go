package store

import (
	"bytes"
	"math"

	"github.com/cockroachdb/pebble/v2"
	"github.com/tallyward/tallyward/internal/sat"
)

// The expiry sweep at a commit examines the index entries that are due
// and, for each record not in a cache, reads the record's newest time
// from Pebble: one point read per entry, on the caller's path, and most
// of a commit's cost once records expire in numbers. So a commit, once
// its goroutine has written it, reads ahead: it walks the index entries
// due at the watermark the pipeline announced (SweepAhead) and keeps the
// newest time of each record as Pebble now holds it. The next sweep uses
// those times instead of reading, for records that are neither cached
// nor staged since: nothing else writes Pebble between two commits, so
// the read-ahead time is still the stored one. What the sweep removes,
// and when, is unchanged; only where its reads happen moves.

// aheadTimes are the newest times read ahead, by record key; absent
// means no record is stored under the key.
type aheadTimes map[string]aheadTime

type aheadTime struct {
	last  int64
	found bool
}

// SweepAhead tells the store that the commit about to be cut swept at
// watermark w, and asks it to read ahead, once written, the records the
// next sweep will examine. That sweep's watermark is not known yet: the
// read-ahead reaches twice the advance since the previous call beyond w
// (the index entries at or below w were just swept).
func (s *Store) SweepAhead(w int64) {
	reach := w
	if s.prevAheadW != math.MinInt64 && w > s.prevAheadW {
		reach = sat.Add(w, 2*sat.Sub(w, s.prevAheadW))
	}
	s.prevAheadW, s.aheadW = w, reach
}

// readAhead runs on a commit's goroutine after the commit landed in
// Pebble. It touches only the database and the peek functions (fixed
// after setup). A failure just leaves no read-ahead: the sweep then
// reads as before.
func (s *Store) readAhead(w int64, peek map[string]func([]byte) (int64, error)) (out aheadTimes) {
	if w == math.MinInt64 || len(peek) == 0 {
		return nil
	}
	defer func() {
		if recover() != nil {
			out = nil // e.g. the database closed under an abandoned store
		}
	}()
	upper := expiryKey(nil, sat.Add(w, 1), "", "")[:9]
	if w == math.MaxInt64 {
		upper = []byte{tagExpiry + 1}
	}
	it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: []byte{tagExpiry}, UpperBound: upper})
	if err != nil {
		return nil
	}
	defer it.Close()
	// One iterator over the records, sought once per entry: a point Get
	// builds iterators over the files it reads each time, and that was
	// the largest share of a pipeline's allocations.
	recs, err := s.db.NewIter(&pebble.IterOptions{LowerBound: []byte{tagRecord}, UpperBound: []byte{tagRecord + 1}})
	if err != nil {
		return nil
	}
	defer recs.Close()
	out = aheadTimes{}
	var key []byte
	// The map's keys share arena chunks: no allocation per entry.
	var keys arena
	keep := func(key []byte) string { return viewString(keys.keep(key)) }
	for ok, n := it.First(), 0; ok && n < SweepLimit; ok, n = it.Next(), n+1 {
		_, table, entity, err := parseExpiryKey(it.Key())
		if err != nil {
			continue
		}
		pk := peek[table]
		if pk == nil {
			continue
		}
		key = RecordKey(key[:0], table, entity)
		if !recs.SeekGE(key) || !bytes.Equal(recs.Key(), key) {
			if err := recs.Error(); err != nil {
				return out
			}
			out[keep(key)] = aheadTime{}
			continue
		}
		v, err := recs.ValueAndErr()
		if err != nil {
			return out
		}
		if last, perr := pk(v); perr == nil {
			out[keep(key)] = aheadTime{last: last, found: true}
		}
	}
	return out
}

// peekFuncs returns each expiring table's PeekLast by table name, for the
// tables whose sweep may read Pebble: a table that has never let a record
// go from its cache but by deletion (knownAbsent, in every part) knows
// that what it does not cache is stored nowhere, so reading ahead for it
// would only read records it holds.
func (s *Store) peekFuncs() map[string]func([]byte) (int64, error) {
	m := map[string]func([]byte) (int64, error){}
	for _, f := range s.tables {
		if p, ok := f.(interface {
			peeker() func([]byte) (int64, error)
		}); ok {
			if pk := p.peeker(); pk != nil {
				m[f.(expirer).tableName()] = pk
			}
		}
	}
	return m
}

func (t *Table[V]) peeker() func([]byte) (int64, error) {
	if t.ttl <= 0 || t.allKnownAbsent() {
		return nil
	}
	return t.PeekLast
}

// allKnownAbsent reports whether every part of t's table is knownAbsent.
func (t *Table[V]) allKnownAbsent() bool {
	for _, p := range t.group() {
		if !p.knownAbsent {
			return false
		}
	}
	return true
}

// aheadLast returns the read-ahead newest time of the record under key,
// if the read-ahead holds it and nothing staged since can be newer.
func (s *Store) aheadLast(key []byte) (last int64, found, ok bool) {
	if s.ahead == nil || s.pendingRecords {
		return 0, false, false
	}
	if _, _, staged := s.lookupStaged(key); staged {
		return 0, false, false
	}
	a, ok := s.ahead[string(key)]
	if ok {
		s.aheadUsed++
	}
	return a.last, a.found, ok
}
