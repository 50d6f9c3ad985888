package sketch

import (
	"math"
	"math/bits"
)

// HyperLogLog register arithmetic shared by the sliding registers.
//
// A 32-bit item fingerprint maps to register j = its top p bits and to rho =
// 1 + the number of leading zeros of the remaining 32-p bits, capped at 33-p
// (Flajolet, Fusy, Gandouet, Meunier, "HyperLogLog: the analysis of a
// near-optimal cardinality estimation algorithm", AofA 2007).

// fpKey packs the register index j and rho of a 32-bit item fingerprint
// (the top 32 bits of Hash) as j<<6 | rho, with rho <= 33-p. Exact and
// sketch mode both identify items by this fingerprint, so an item maps to
// the same register whichever mode it arrived in.
func fpKey(fp uint32, p uint8) uint32 {
	j := fp >> (32 - p)
	w := fp<<p | 1<<(p-1)
	rho := uint32(bits.LeadingZeros32(w)) + 1
	return j<<6 | rho
}

// estimateHist returns the cardinality estimate for m = 2^p registers
// over 32-bit fingerprints whose values are counted in hist (hist[k] =
// number of registers holding k): ertlRaw with q = 32-p, then the
// fingerprint-space correction below.
func estimateHist(hist *[64]uint32, p uint8) float64 {
	e := ertlRaw(hist[:], p, 32-int(p))
	// The registers count distinct 32-bit fingerprints; n items occupy
	// N(1-exp(-n/N)) of the N = 2^32 fingerprints in expectation, so invert
	// that (Whang, Vander-Zanden, Taylor, "A linear-time probabilistic
	// counting algorithm for database applications", ACM TODS 15(2), 1990).
	const n32 = 1 << 32
	if e >= n32 {
		return e
	}
	return -n32 * math.Log1p(-e/n32)
}

// ertlRaw is the improved raw estimator of Ertl, "New cardinality
// estimation algorithms for HyperLogLog sketches", arXiv:1702.01284, 2017
// (formula from memory; checked against exact counts in the tests), for
// m = 2^p registers holding values 0..q+1 counted in hist (len >= q+2).
// Unlike the raw estimator with a linear-counting switch it has no bias
// bump between 2.5m and 5m, and it costs O(q) operations on the
// histogram, independent of m.
func ertlRaw(hist []uint32, p uint8, q int) float64 {
	m := float64(uint64(1) << p)
	z := m * ertlTau(1-float64(hist[q+1])/m)
	for k := q; k >= 1; k-- {
		z = 0.5 * (z + float64(hist[k]))
	}
	z += m * ertlSigma(float64(hist[0])/m)
	return m * m / (2 * math.Ln2) / z
}

func ertlSigma(x float64) float64 {
	if x == 1 {
		return math.Inf(1)
	}
	y, z := 1.0, x
	for {
		x *= x
		prev := z
		z += x * y
		y += y
		if z == prev {
			return z
		}
	}
}

func ertlTau(x float64) float64 {
	if x == 0 || x == 1 {
		return 0
	}
	y, z := 1.0, 1-x
	for {
		x = math.Sqrt(x)
		prev := z
		y *= 0.5
		z -= (1 - x) * (1 - x) * y
		if z == prev {
			return z / 3
		}
	}
}

// Sliding registers: each register keeps the frontier of (pane, rho) pairs
// not dominated by a pair with a later-or-equal pane and a greater-or-equal
// rho (Chabchoub, Hebrail, "Sliding HyperLogLog", IEEE ICDM Workshops 2010,
// at pane granularity). Invariant: within a register, entries are sorted by
// pane ascending and rho strictly descending. The register value of a window
// starting at pane s is the rho of the first entry with pane >= s. Because
// the frontier of a set of pairs does not depend on their order, the
// registers are independent of arrival order.
//
// A register's frontier is packed into one uint64 of up to four 16-bit
// entries (rho<<10 | pane-base, zero = empty slot, oldest first). A frontier
// longer than four lives in spill, and its word holds spillMark.
const (
	frontierInline = 4
	paneOffBits    = 10
	maxPaneOff     = 1<<paneOffBits - 1
	spillMark      = ^uint64(0)
	// maxSpan is the largest retained pane count a spec may ask for; offsets
	// up to maxPaneOff leave room to fold maxPaneOff-maxSpan panes between
	// rebases.
	maxSpan = 512
)

type slidingRegs struct {
	p     uint8
	words []uint64
	spill map[uint32][]uint16
	base  int64 // pane index of offset 0
}

func newSlidingRegs(p uint8, base int64) *slidingRegs {
	return &slidingRegs{p: p, words: make([]uint64, 1<<p), base: base}
}

// load appends register j's frontier to buf[:0], oldest first.
func (s *slidingRegs) load(j uint32, buf []uint16) []uint16 {
	buf = buf[:0]
	w := s.words[j]
	if w == spillMark {
		return append(buf, s.spill[j]...)
	}
	for i := 3; i >= 0; i-- {
		e := uint16(w >> (16 * i))
		if e == 0 {
			break
		}
		buf = append(buf, e)
	}
	return buf
}

func (s *slidingRegs) store(j uint32, list []uint16) {
	if len(list) > frontierInline {
		if s.spill == nil {
			s.spill = make(map[uint32][]uint16)
		}
		s.spill[j] = append(s.spill[j][:0], list...)
		s.words[j] = spillMark
		return
	}
	if s.words[j] == spillMark {
		delete(s.spill, j)
	}
	var w uint64
	for i, e := range list {
		w |= uint64(e) << (16 * (3 - i))
	}
	s.words[j] = w
}

// insert adds (pane, rho) to register j and reports whether the frontier
// changed. The caller guarantees 0 <= pane-base <= maxPaneOff.
func (s *slidingRegs) insert(j uint32, pane int64, rho uint8) bool {
	off := uint16(pane - s.base)
	if w := s.words[j]; w != spillMark {
		// Fast path, the common case once a register is warm: the new
		// entry is dominated by an inline one.
		for i := 3; i >= 0; i-- {
			e := uint16(w >> (16 * i))
			if e == 0 {
				break
			}
			if e&maxPaneOff >= off && uint8(e>>paneOffBits) >= rho {
				return false
			}
		}
	}
	var arr [64]uint16
	list := s.load(j, arr[:0])
	// Dominated by an entry at a later-or-equal pane with greater-or-equal rho?
	for _, e := range list {
		if e&maxPaneOff >= off && uint8(e>>paneOffBits) >= rho {
			return false
		}
	}
	var out [64]uint16
	res := out[:0]
	placed := false
	for _, e := range list {
		eo, er := e&maxPaneOff, uint8(e>>paneOffBits)
		if eo <= off && er <= rho {
			continue // dominated by the new entry
		}
		if !placed && eo > off {
			res = append(res, uint16(rho)<<paneOffBits|off)
			placed = true
		}
		res = append(res, e)
	}
	if !placed {
		res = append(res, uint16(rho)<<paneOffBits|off)
	}
	s.store(j, res)
	return true
}

// valueFrom returns register j's value for a window starting at pane start.
func (s *slidingRegs) valueFrom(j uint32, start int64) uint8 {
	w := s.words[j]
	if w == spillMark {
		for _, e := range s.spill[j] {
			if s.base+int64(e&maxPaneOff) >= start {
				return uint8(e >> paneOffBits)
			}
		}
		return 0
	}
	return inlineValueFrom(w, start-s.base)
}

// Lanes of an inline frontier word, for inlineValueFrom.
const (
	laneOffsets = 0x03ff_03ff_03ff_03ff
	laneTops    = 0x8000_8000_8000_8000
	laneOnes    = 0x0001_0001_0001_0001
)

// inlineValueFrom is the value of inline frontier word w for a window
// starting at offset off from the base: the rho of its oldest entry whose
// offset is at least off. A view rebuild asks it of every register, so it
// compares the four lanes at once instead of walking them: with each
// lane's top bit set, subtracting off from every lane borrows across no
// lane boundary and leaves the top bit set exactly where offset >= off.
// Empty lanes (offset 0, rho 0) follow the entries, so they match only
// when off <= 0, where the oldest lane answers: its rho, or 0 for an
// empty word.
func inlineValueFrom(w uint64, off int64) uint8 {
	if off <= 0 {
		return uint8(w >> 58)
	}
	if off > maxPaneOff {
		return 0
	}
	ge := ((w&laneOffsets | laneTops) - uint64(off)*laneOnes) & laneTops
	if ge == 0 {
		return 0
	}
	return uint8(w << bits.LeadingZeros64(ge) >> 58)
}

// rebase drops entries older than newBase and renumbers offsets from it.
func (s *slidingRegs) rebase(newBase int64) {
	if newBase <= s.base {
		return
	}
	var arr, out [64]uint16
	for j := range s.words {
		if s.words[j] == 0 {
			continue
		}
		list := s.load(uint32(j), arr[:0])
		res := out[:0]
		for _, e := range list {
			pane := s.base + int64(e&maxPaneOff)
			if pane < newBase {
				continue
			}
			res = append(res, e&^maxPaneOff|uint16(pane-newBase))
		}
		s.store(uint32(j), res)
	}
	s.base = newBase
}

func (s *slidingRegs) sizeBytes() int {
	n := 48 + 8*len(s.words)
	for _, l := range s.spill {
		n += 48 + 2*cap(l)
	}
	return n
}

// regView is the register vector of one window start, with its histogram
// and a cached estimate.
type regView struct {
	start    int64
	withTail bool // includes every unsettled (tail) entry of the window
	valid    bool
	estOK    bool
	est      float64
	regs     []uint8
	hist     [64]uint32
	stamps   uint64 // last use, for replacement
}
