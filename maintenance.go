package tallyward

import (
	"errors"
	"fmt"

	"github.com/tallyward/tallyward/internal/store"
)

// ErrUnknownEntity is returned for an entity name the Spec does not define.
var ErrUnknownEntity = errors.New("tallyward: unknown entity")

func (p *Pipeline[E]) entity(name string) (int, *entityState[E], error) {
	for i, es := range p.ents {
		if es.ent.Name == name {
			return i, es, nil
		}
	}
	return 0, nil, fmt.Errorf("%w %q", ErrUnknownEntity, name)
}

// Erase removes every stored trace of one entity key (say, for a privacy
// or legal request): its record with all feature states, its expiry index
// entry, and its inputs in held Settled events. It then commits, so the
// erasure is durable when Erase returns.
//
// The erasure is remembered by a tombstone holding only a salted hash of
// the key: later events naming the key, including a replay of older
// history, do not recreate it (they are counted in Stats.ErasedSkips and
// read NaN) until LiftErasure. After Compact and Close no file of the
// store holds a byte sequence of the key, recycled logs included.
func (p *Pipeline[E]) Erase(entity, key string) error {
	if err := p.usable(); err != nil {
		return err
	}
	if err := p.finishWork(); err != nil {
		return err
	}
	i, es, err := p.entity(entity)
	if err != nil {
		return err
	}
	if key == "" {
		return fmt.Errorf("tallyward: Erase: empty key")
	}
	existed, err := es.part(key).Delete(key)
	if err != nil {
		p.err = err
		return err
	}
	if existed {
		p.c.live--
		p.c.erased++
	}
	if err := p.store.SetTombstone(entity, key, true); err != nil {
		p.err = err
		return err
	}
	// Editing held inputs in place keeps the tree valid: its order is
	// (time, tie-break, seq), and the tie-break was hashed on arrival.
	p.held.Ascend(func(h *held[E]) bool {
		if h.in.keys[i] == key {
			h.in.keys[i] = ""
			clear(h.in.on[es.first : es.first+len(es.kinds)])
		}
		return true
	})
	return p.Commit(nil)
}

// LiftErasure lifts the tombstone Erase left for (entity, key): later events
// build its state afresh. It commits.
func (p *Pipeline[E]) LiftErasure(entity, key string) error {
	if err := p.usable(); err != nil {
		return err
	}
	if err := p.finishWork(); err != nil {
		return err
	}
	if _, _, err := p.entity(entity); err != nil {
		return err
	}
	if err := p.store.SetTombstone(entity, key, false); err != nil {
		p.err = err
		return err
	}
	return p.Commit(nil)
}

// Erased reports whether Erase left a tombstone for (entity, key) that
// LiftErasure has not lifted: its state is gone and later events naming it
// are skipped. For tools and audits; Lookup answers an erased key like a
// new one.
func (p *Pipeline[E]) Erased(entity, key string) (bool, error) {
	if err := p.usable(); err != nil {
		return false, err
	}
	if err := p.finishWork(); err != nil {
		return false, err
	}
	_, es, err := p.entity(entity)
	if err != nil {
		return false, err
	}
	return p.store.Erased(es.ent.Name, key), nil
}

// Snapshot commits and writes a consistent copy of the pipeline's state
// (records, definitions, source position and watermark) to dir, which must
// not exist, on the pipeline's filesystem. Opening a pipeline with
// Options{Dir: dir} (or on a copy made by CopySnapshot) resumes exactly
// where this one was at the snapshot: feed it from its ResumeSeq().
//
// Settled events held at the snapshot are re-read from the source by the
// opened copy (Resume is at or below the oldest of them).
func (p *Pipeline[E]) Snapshot(dir string) error {
	if err := p.Commit(nil); err != nil {
		return err
	}
	return p.store.Snapshot(dir)
}

// CopySnapshot copies a snapshot directory src to dst (which must not
// exist) on the OS filesystem, e.g. onto a volume that another machine
// mounts. A snapshot is plain files: any copy that preserves them whole
// works as well.
func CopySnapshot(src, dst string) error {
	return store.CopySnapshot(nil, src, nil, dst)
}
