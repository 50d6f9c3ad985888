package sketch

import (
	"encoding/binary"
	"fmt"
	"math/bits"
	"slices"
	"time"

	"github.com/tallyward/tallyward/internal/wire"
)

// Merge adds every item of o to d. Both must have the same spec
// (ErrIncompatible otherwise, d unchanged). Exact entries and register
// frontiers are unions, so the answers do not depend on the order of
// merges and adds, except at the exact-to-sketch switch: if o is in sketch
// mode, d switches too, even if a single summary fed both streams would
// still be exact (see the package doc, Order).
func (d *Distinct) Merge(o *Distinct) error {
	if d.sh == nil || o.sh == nil || d.sh.spec != o.sh.spec {
		return fmt.Errorf("distinct merge: spec %+v vs %+v: %w", d.Spec(), o.Spec(), ErrIncompatible)
	}
	if !o.has {
		return nil
	}
	if !d.has || o.newest > d.newest {
		d.newest, d.has = o.newest, true
	}
	d.cacheOK = false
	floor := d.floorPane()
	if o.sk == nil {
		for _, e := range o.exact {
			if d.pane(e.t) < floor {
				continue
			}
			if d.sk != nil {
				d.addSketch(e.t, fpKey(e.fp, d.sh.spec.Precision))
			} else {
				d.addExact(e.fp, e.t)
			}
		}
		if d.sk != nil {
			d.settleTail()
		}
		return nil
	}
	if d.sk == nil {
		d.normalizeExact()
		d.promote()
	}
	var arr [64]uint16
	for j := range o.sk.regs.words {
		for _, e := range o.sk.regs.load(uint32(j), arr[:0]) {
			d.fold(o.sk.regs.base+int64(e&maxPaneOff), uint32(j)<<6|uint32(e>>paneOffBits))
		}
	}
	for _, e := range o.liveTail() {
		d.addSketch(e.t, e.key)
	}
	d.settleTail()
	return nil
}

const (
	flagHasNewest = 1 << 0
	flagSketch    = 1 << 1
)

// AppendBinary appends the encoding of d to dst (see UnmarshalBinary for
// the layout). It may compact d's exact entries, which changes no answer.
func (d *Distinct) AppendBinary(dst []byte) ([]byte, error) {
	if d.sh == nil {
		return dst, fmt.Errorf("distinct: %w: not built from a valid spec", ErrInvalidSpec)
	}
	s := d.sh.spec
	dst = append(dst, formatVersion1, kindDistinct)
	dst = binary.AppendUvarint(dst, uint64(s.Window))
	dst = binary.AppendUvarint(dst, uint64(s.Resolution))
	dst = binary.AppendUvarint(dst, uint64(s.Horizon))
	dst = append(dst, s.Precision)
	dst = binary.AppendUvarint(dst, uint64(s.ExactLimit))
	if !d.has {
		return append(dst, 0), nil
	}
	flags := byte(flagHasNewest)
	if d.sk != nil {
		flags |= flagSketch
	}
	dst = append(dst, flags)
	dst = binary.AppendVarint(dst, d.newest)
	newestPane := d.pane(d.newest)
	settled := d.newest - int64(s.Horizon)
	floor := d.floorPane()
	if d.sk == nil {
		d.normalizeExact()
		nSettled := 0
		for _, e := range d.exact {
			if e.t <= settled {
				nSettled++
			}
		}
		dst = binary.AppendUvarint(dst, uint64(nSettled))
		if nSettled > 0 {
			k := riceParam(nSettled)
			ageBits := uint(bits.Len64(uint64(newestPane - floor)))
			dst = append(dst, byte(k))
			// The bit stream goes straight into dst behind its length,
			// with no buffer of its own.
			dst, _ = wire.AppendFramed(dst, func(dst []byte) ([]byte, error) {
				w := bitWriter{buf: dst}
				var prev uint32
				for _, e := range d.exact {
					if e.t > settled {
						continue
					}
					w.rice(uint64(e.fp-prev), k)
					w.write(uint64(newestPane-d.pane(e.t)), ageBits)
					prev = e.fp
				}
				return w.flush(), nil
			})
		}
		dst = binary.AppendUvarint(dst, uint64(len(d.exact)-nSettled))
		for _, e := range d.exact {
			if e.t > settled {
				dst = appendU32(dst, e.fp)
				dst = binary.AppendUvarint(dst, uint64(d.newest-e.t))
			}
		}
		return dst, nil
	}
	var arr [64]uint16
	r := d.sk.regs
	for j := range r.words {
		list := r.load(uint32(j), arr[:0])
		n := 0
		for _, e := range list {
			if r.base+int64(e&maxPaneOff) >= floor {
				n++
			}
		}
		dst = append(dst, byte(n))
		for _, e := range list[len(list)-n:] {
			dst = append(dst, byte(e>>paneOffBits))
			dst = binary.AppendUvarint(dst, uint64(newestPane-r.base-int64(e&maxPaneOff)))
		}
	}
	dst = binary.AppendUvarint(dst, uint64(len(d.liveTail())))
	for _, e := range d.liveTail() {
		dst = binary.AppendUvarint(dst, uint64(e.key))
		dst = binary.AppendUvarint(dst, uint64(d.newest-e.t))
	}
	return dst, nil
}

// riceParam picks the Rice parameter for n sorted 32-bit fingerprints:
// about log2 of the mean gap 2^32/n, at most 31 (the decoder's limit; a
// single fingerprint would otherwise ask for 32).
func riceParam(n int) uint {
	k := bits.Len64(uint64(1)<<32/uint64(n)) - 1
	return uint(min(max(k, 0), 31))
}

// UnmarshalBinary replaces d with the decoded summary, spec included. On
// error d is unchanged.
//
// Version 1 layout (uvarint/varint are encoding/binary's; times in ns):
//
//	byte     version = 1 (ErrUnknownVersion otherwise)
//	byte     kind = 1 (distinct)
//	uvarint  Window, uvarint Resolution, uvarint Horizon
//	byte     Precision, uvarint ExactLimit (the spec must pass Validate)
//	byte     flags: bit 0 = has items, bit 1 = sketch mode; other bits 0.
//	         If bit 0 is clear the encoding ends here and bit 1 must be 0.
//	varint   newest: the largest time added
//
// Below, P = pane(newest), F = pane(newest-Horizon) - Window/Resolution + 1
// (the oldest retained pane), S = newest - Horizon (settled time).
// An item's fingerprint is the top 32 bits of Hash (XXH64, seed 0).
//
// Exact mode (bit 1 clear):
//
//	uvarint  n settled entries, one per fingerprint, fingerprints strictly
//	         increasing; if n > 0:
//	byte     Rice parameter k (0..31)
//	uvarint  length of the bit stream in bytes, then the bit stream (MSB
//	         first, zero padded to a byte): per entry the fingerprint minus
//	         the previous one (the first: minus 0), Rice-coded with k, then
//	         the pane age P - pane as a fixed field of bits.Len(P-F) bits.
//	         The entry's time is the start of that pane; it must be <= S.
//	uvarint  n unsettled entries, (fingerprint, time) strictly increasing:
//	4 bytes  fingerprint, big endian
//	uvarint  newest - time, below Horizon (time > S)
//
// The number of distinct fingerprints must not exceed ExactLimit.
//
// Sketch mode (bit 1 set), 2^Precision registers in index order:
//
//	byte     n frontier entries (0..33-Precision), oldest first, then n times:
//	byte     rho, strictly decreasing, in 1..33-Precision
//	uvarint  pane age P - pane, strictly decreasing, pane >= F
//	uvarint  n unsettled entries, (time, key) strictly increasing:
//	uvarint  key = register<<6 | rho
//	uvarint  newest - time, below Horizon
//
// Bytes after the last field return ErrTrailingBytes; anything else
// malformed returns ErrCorrupt.
func (d *Distinct) UnmarshalBinary(b []byte) error { return named("distinct", d.unmarshal(b)) }

func (d *Distinct) unmarshal(b []byte) error {
	r := header(&wire.Decoder{B: b}, kindDistinct)
	if r.Err != nil {
		return r.Err
	}
	var s DistinctSpec
	s.Window = time.Duration(min(r.Uvarint(), 1<<62))
	s.Resolution = time.Duration(min(r.Uvarint(), 1<<62))
	s.Horizon = time.Duration(min(r.Uvarint(), 1<<62))
	s.Precision = r.Byte()
	s.ExactLimit = int(min(r.Uvarint(), 1<<20))
	flags := r.Byte()
	if r.Err != nil {
		return r.Err
	}
	if s.Precision == 0 || s.ExactLimit == 0 {
		return corruptf("zero Precision or ExactLimit")
	}
	if err := s.Validate(); err != nil {
		return corruptf("%v", err)
	}
	sh := d.sh
	if sh == nil || sh.spec != s {
		sh = newDistinctShape(s) // a decoded spec other than the receiver's: its own shape
	}
	nd := &Distinct{sh: sh}
	if flags&^(flagHasNewest|flagSketch) != 0 || flags == flagSketch {
		return corruptf("flags %#x", flags)
	}
	if flags&flagHasNewest == 0 {
		if err := r.Finish(); err != nil {
			return err
		}
		*d = *nd
		d.exact = d.einl[:0]
		return nil
	}
	nd.has = true
	nd.newest = r.Varint()
	if r.Err == nil && (nd.newest < minTime || nd.newest > maxTime) {
		r.Fail("newest %d out of range", nd.newest)
	}
	if r.Err != nil {
		return r.Err
	}
	// Exact entries are decoded onto d's inline storage (a few entries
	// need no allocation), which is put back if the input is refused.
	saved := d.einl
	nd.exact = d.einl[:0]
	err := func() error {
		if flags&flagSketch == 0 {
			if err := nd.decodeExact(r); err != nil {
				return err
			}
		} else if err := nd.decodeSketch(r); err != nil {
			return err
		}
		return r.Finish()
	}()
	if err != nil {
		d.einl = saved
		return err
	}
	nd.einl = d.einl
	*d = *nd
	if d.sk != nil {
		d.exact = d.einl[:0]
	} else if len(d.exact) <= inlineExact {
		d.exact = append(d.einl[:0], d.exact...)
	}
	return nil
}

func (d *Distinct) decodeExact(r *wire.Decoder) error {
	P := d.pane(d.newest)
	F := d.floorPane()
	S := d.newest - d.hor()
	limit := d.sh.spec.ExactLimit
	n := r.Count(0, uint64(limit))
	if n > 0 {
		k := uint(r.Byte())
		body := r.Bytes(r.Len())
		if r.Err != nil {
			return r.Err
		}
		if k > 31 {
			return corruptf("Rice parameter %d", k)
		}
		ageBits := uint(bits.Len64(uint64(P - F)))
		br := bitReader{b: body}
		var fp uint64
		d.exact = slices.Grow(d.exact[:0], n)
		for i := range n {
			delta := br.rice(k, (1<<32)>>k)
			age := int64(br.read(ageBits))
			fp += delta
			if br.bad || fp >= 1<<32 || (i > 0 && delta == 0) || age > P-F {
				return corruptf("settled entry %d", i)
			}
			t := (P - age) * d.res()
			if t > S {
				return corruptf("settled entry %d at %d after settled time %d", i, t, S)
			}
			d.exact = append(d.exact, exactEntry{fp: uint32(fp), t: t})
		}
		if !br.padOK() {
			return corruptf("settled bit stream length or padding")
		}
	}
	nt := r.Count(5, uint64(len(r.B)))
	for i := range nt {
		e := exactEntry{fp: r.Uint32BE()}
		age := r.Uvarint()
		if r.Err != nil {
			return r.Err
		}
		if age >= uint64(d.hor()) {
			return corruptf("unsettled entry %d age %d >= Horizon", i, age)
		}
		e.t = d.newest - int64(age)
		if i > 0 {
			if p := d.exact[len(d.exact)-1]; p.t > S && (cmpExact(p, e) >= 0 || p.fp == e.fp && d.pane(p.t) == d.pane(e.t)) {
				return corruptf("unsettled entry %d out of order or in the pane of the previous one", i)
			}
		}
		d.exact = append(d.exact, e)
	}
	sortExact(d.exact)
	for i := 1; i < len(d.exact); i++ {
		if cmpExact(d.exact[i-1], d.exact[i]) == 0 {
			return corruptf("duplicate entry")
		}
	}
	if countFP(d.exact) > limit {
		return corruptf("%d items exceed ExactLimit %d", countFP(d.exact), limit)
	}
	d.relink()
	return nil
}

func countFP(es []exactEntry) int {
	n := 0
	for i, e := range es {
		if i == 0 || es[i-1].fp != e.fp {
			n++
		}
	}
	return n
}

func (d *Distinct) decodeSketch(r *wire.Decoder) error {
	p := d.sh.spec.Precision
	P := d.pane(d.newest)
	F := d.floorPane()
	maxRho := 33 - p
	m := 1 << p
	if len(r.B) < m {
		return corruptf("%d registers need at least %d bytes, %d remain", m, m, len(r.B))
	}
	d.sk = &distinctSketch{regs: newSlidingRegs(p, F)}
	var list [64]uint16
	for j := range m {
		n := int(r.Byte())
		if n > int(maxRho) {
			r.Fail("register %d: %d entries", j, n)
		}
		prevRho, prevAge := uint8(255), uint64(1<<63)
		l := list[:0]
		for range n {
			rho := r.Byte()
			age := r.Uvarint()
			if r.Err != nil {
				return r.Err
			}
			if rho == 0 || rho > maxRho || rho >= prevRho || age >= prevAge || age > uint64(P-F) {
				return corruptf("register %d frontier entry (rho %d, age %d)", j, rho, age)
			}
			prevRho, prevAge = rho, age
			l = append(l, uint16(rho)<<paneOffBits|uint16(P-int64(age)-F))
		}
		if r.Err != nil {
			return r.Err
		}
		if n > 0 {
			d.sk.regs.store(uint32(j), l)
		}
	}
	nt := r.Count(2, uint64(len(r.B)))
	for i := range nt {
		key := r.Uvarint()
		age := r.Uvarint()
		if r.Err != nil {
			return r.Err
		}
		rho := key & 63
		if key>>6 >= uint64(m) || rho == 0 || rho > uint64(maxRho) || age >= uint64(d.hor()) {
			return corruptf("unsettled entry %d (key %d, age %d)", i, key, age)
		}
		e := tailEntry{t: d.newest - int64(age), key: uint32(key)}
		if i > 0 && cmpTail(d.sk.tail[i-1], e) >= 0 {
			return corruptf("unsettled entry %d out of order", i)
		}
		d.sk.tail = append(d.sk.tail, e)
	}
	return r.Err
}

func sortExact(es []exactEntry) {
	// Insertion sort: the settled prefix and the unsettled suffix are each
	// sorted already, and both are short.
	for i := 1; i < len(es); i++ {
		for j := i; j > 0 && cmpExact(es[j-1], es[j]) > 0; j-- {
			es[j-1], es[j] = es[j], es[j-1]
		}
	}
}
