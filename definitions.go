package tallyward

import (
	"errors"
	"fmt"
	"slices"
	"strconv"
	"strings"

	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/store"
	"github.com/tallyward/tallyward/internal/wire"
)

// ttlFor is the default or configured expiry of an entity's records.
func ttlFor[E any](features []Feature[E], opts Options) int64 {
	if opts.TTL < 0 {
		return 0
	}
	if opts.TTL > 0 {
		return int64(opts.TTL)
	}
	var longest int64
	for _, f := range features {
		r := reachNanos(f.Kind)
		if r == 0 {
			return 0
		}
		longest = max(longest, r)
	}
	return sat.Add(longest, int64(opts.MaxDisorder))
}

// Stored definition names:
//
//	feature/<entity>.<feature>  the feature's Kind.Describe()
//	entity/<entity>             "features=" + the feature names in record order
//	ttl/<entity>                the expiry in ns ("0": never)
//	pipeline/max-disorder       Options.MaxDisorder in ns
//	items/hash                  how items are hashed (see itemHashing)
//
// "<entity>.<feature>" is unambiguous because Spec validation refuses two
// features whose joined names are equal (entity "a" with feature "b.c"
// and entity "a.b" with feature "c"); the entity/ lists tell stores apart
// across spec changes.
func (p *Pipeline[E]) definitions() map[string]string {
	defs := map[string]string{
		defMaxDisorder: strconv.FormatInt(int64(p.opts.MaxDisorder), 10),
		defItemHash:    p.items.describe(),
	}
	for _, es := range p.ents {
		names := make([]string, len(es.ent.Features))
		for i, f := range es.ent.Features {
			names[i] = f.Name
			defs["feature/"+es.ent.Name+"."+f.Name] = f.Kind.Describe()
		}
		defs["entity/"+es.ent.Name] = "features=" + strings.Join(names, ",")
		defs["ttl/"+es.ent.Name] = strconv.FormatInt(es.ttl, 10)
	}
	return defs
}

// checkDefinitions compares the stored definitions with the spec. Every
// difference in a feature must be listed in Options.ResetFeatures; listed ones are
// reset by rewriting the entity's records. A changed TTL only rebuilds the
// expiry index.
func (p *Pipeline[E]) checkDefinitions() error {
	stored, err := p.store.Definitions()
	if err != nil {
		return err
	}
	if err := p.chooseItemHashing(stored); err != nil {
		return err
	}
	want := p.definitions()
	if err := p.checkResetNames(stored); err != nil {
		return err
	}
	if len(stored) == 0 {
		return p.writeDefinitions(stored, want)
	}
	reset := map[string]bool{}
	for _, n := range p.opts.ResetFeatures {
		reset[n] = true
	}
	var errs []error
	changed := map[string]map[string]bool{} // entity -> features to start empty
	note := func(ent, feat, what string) {
		name := ent + "." + feat
		if !reset[name] {
			errs = append(errs, fmt.Errorf("%w: feature %s %s; list it in Options.ResetFeatures to discard its state (a backfill is then needed)", ErrDefinitionChanged, name, what))
			return
		}
		if changed[ent] == nil {
			changed[ent] = map[string]bool{}
		}
		changed[ent][feat] = true
		p.notices = append(p.notices, fmt.Sprintf("feature %s %s: its state was reset and starts empty; backfill from history to rebuild it", name, what))
	}
	storedEntities := storedFeatures(stored)
	// MaxDisorder is part of what shaped stored state, like a window
	// length: every aggregate keeps its events exact for exactly the
	// horizon it was built with, and its decoder checks that. Adapting the
	// state on read instead would silently fold events (a smaller
	// setting) or promise exactness the old state cannot give (a larger
	// one), in every format of package window and sketch. So a change is
	// a definition change of every feature, with the same error and the
	// same way out (Options.ResetFeatures).
	oldDisorder, hasDisorder := stored[defMaxDisorder]
	disorderChanged := hasDisorder && string(oldDisorder) != want[defMaxDisorder]
	if !hasDisorder && len(storedEntities) > 0 {
		p.notices = append(p.notices, fmt.Sprintf("the store predates recording MaxDisorder: taken to be unchanged (%v) and recorded now", p.opts.MaxDisorder))
	}
	for _, es := range p.ents {
		ent := es.ent.Name
		old := storedEntities[ent]
		for _, f := range es.ent.Features {
			got, ok := stored["feature/"+ent+"."+f.Name]
			switch {
			case !ok || !slices.Contains(old, f.Name):
				note(ent, f.Name, "is new")
			case string(got) != f.Kind.Describe():
				note(ent, f.Name, fmt.Sprintf("changed from %q to %q", got, f.Kind.Describe()))
			case disorderChanged:
				note(ent, f.Name, fmt.Sprintf("was built for MaxDisorder %sns, now %sns (stored state is exact for the old setting only; or keep the old MaxDisorder)", oldDisorder, want[defMaxDisorder]))
			}
		}
		for _, f := range old {
			if !slices.ContainsFunc(es.ent.Features, func(g Feature[E]) bool { return g.Name == f }) {
				note(ent, f, "was removed")
			}
		}
	}
	var gone []string
	for _, ent := range sortedKeys(storedEntities) {
		if slices.ContainsFunc(p.ents, func(es *entityState[E]) bool { return es.ent.Name == ent }) {
			continue
		}
		for _, f := range storedEntities[ent] {
			note(ent, f, "was removed")
		}
		gone = append(gone, ent)
	}
	if err := errors.Join(errs...); err != nil {
		return err
	}
	for _, es := range p.ents {
		if feats := changed[es.ent.Name]; feats != nil {
			if err := p.resetFeatures(es, storedEntities[es.ent.Name], feats); err != nil {
				return err
			}
		}
	}
	for _, ent := range gone {
		if err := p.dropEntity(ent); err != nil {
			return err
		}
	}
	for _, es := range p.ents {
		if string(stored["ttl/"+es.ent.Name]) != want["ttl/"+es.ent.Name] && storedEntities[es.ent.Name] != nil {
			if err := es.parts[0].RebuildExpiry(); err != nil {
				return err
			}
		}
	}
	if err := p.writeDefinitions(stored, want); err != nil {
		return err
	}
	return nil
}

func (p *Pipeline[E]) writeDefinitions(stored map[string][]byte, want map[string]string) error {
	for name, d := range want {
		if string(stored[name]) != d {
			if err := p.store.SetDefinition(name, []byte(d)); err != nil {
				return err
			}
		}
	}
	for name := range stored {
		if _, ok := want[name]; !ok {
			if err := p.store.DeleteDefinition(name); err != nil {
				return err
			}
		}
	}
	return nil
}

// resetFeatures rewrites every record of es: features kept unchanged keep
// their stored bytes, reset or new ones start empty, removed ones go.
func (p *Pipeline[E]) resetFeatures(es *entityState[E], oldNames []string, reset map[string]bool) error {
	empty := make([][]byte, len(es.kinds))
	for i, a := range es.fresh() {
		b, err := a.AppendBinary(nil)
		if err != nil {
			return err
		}
		empty[i] = b
	}
	return es.parts[0].Rewrite(func(_ string, val []byte) ([]byte, error) {
		last, blobs, err := splitRecord(val)
		if err != nil {
			return nil, err
		}
		if len(blobs) != len(oldNames) {
			return nil, fmt.Errorf("%w: holds %d features, stored definition lists %d", errRecord, len(blobs), len(oldNames))
		}
		r := rawRecord{last: last}
		for i, f := range es.ent.Features {
			j := slices.Index(oldNames, f.Name)
			if j < 0 || reset[f.Name] {
				r.blobs = append(r.blobs, empty[i])
			} else {
				r.blobs = append(r.blobs, blobs[j])
			}
		}
		return r.append(nil), nil
	})
}

// dropEntity deletes every record of an entity no longer defined.
func (p *Pipeline[E]) dropEntity(ent string) error {
	es := &entityState[E]{ent: Entity[E]{Name: ent}}
	es.parts = []*store.Table[*record]{newDropTable(p, ent)}
	var n int64
	err := es.parts[0].Rewrite(func(string, []byte) ([]byte, error) { n++; return nil, nil })
	p.c.live -= n
	return err
}

// rawRecord is a record whose feature encodings are kept as bytes.
type rawRecord struct {
	last  int64
	blobs [][]byte
}

func (r rawRecord) append(dst []byte) []byte {
	dst, _ = appendRecord(dst, r.last, len(r.blobs), func(i int, dst []byte) ([]byte, error) { return append(dst, r.blobs[i]...), nil })
	return dst
}

// splitRecord parses a record without decoding its features.
func splitRecord(b []byte) (last int64, blobs [][]byte, err error) {
	d := wire.Decoder{B: b}
	if v := d.Byte(); d.Err == nil && v != recordVersion1 {
		return 0, nil, fmt.Errorf("%w: unknown version %d", errRecord, v)
	}
	last = d.Varint()
	n := d.Len()
	for range n {
		blobs = append(blobs, d.Bytes(d.Len()))
	}
	if err := d.Finish(); err != nil {
		return 0, nil, fmt.Errorf("%w: %w", errRecord, err)
	}
	return last, blobs, nil
}

func newDropTable[E any](p *Pipeline[E], ent string) *store.Table[*record] {
	return store.NewTable(p.store, ent, 0, func([]byte) (*record, error) {
		return nil, errors.New("entity no longer defined")
	})
}

// storedFeatures reads the entity/ definitions: feature names by entity.
func storedFeatures(stored map[string][]byte) map[string][]string {
	out := map[string][]string{}
	for name, v := range stored {
		if ent, ok := strings.CutPrefix(name, "entity/"); ok {
			out[ent] = strings.Split(strings.TrimPrefix(string(v), "features="), ",")
		}
	}
	return out
}

// checkResetNames refuses Options.ResetFeatures names that match no
// feature of the spec and no stored one: a typo would otherwise leave the
// intended feature unreset and the error it meant to clear in place.
func (p *Pipeline[E]) checkResetNames(stored map[string][]byte) error {
	known := map[string]bool{}
	for _, n := range p.names {
		known[n] = true
	}
	for ent, feats := range storedFeatures(stored) {
		for _, f := range feats {
			known[ent+"."+f] = true
		}
	}
	var errs []error
	for _, n := range p.opts.ResetFeatures {
		if !known[n] {
			errs = append(errs, fmt.Errorf("%w: Options.ResetFeatures lists %q, which is neither a feature of the spec nor a stored one", ErrUnknownFeature, n))
		}
	}
	return errors.Join(errs...)
}

// Notices returns what Open did beyond the usual: features reset by
// Options.ResetFeatures, each needing a backfill, and how an older store
// was carried forward (unkeyed item hashes, MaxDisorder recorded).
func (p *Pipeline[E]) Notices() []string { return slices.Clone(p.notices) }
