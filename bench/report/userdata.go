package report

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/axiomhq/hyperloglog"

	"github.com/tallyward/tallyward/sketch"
)

// Row is one row of a user's data: an entity key, an item seen with it,
// and optionally a value and an event time (Unix ns).
type Row struct {
	Key, Item string
	Value     float64
	HasValue  bool
	Time      int64
	HasTime   bool
}

// ErrBadRow is wrapped by every error ReadRows returns for a malformed row.
var ErrBadRow = errors.New("report: bad row")

// ReadRows reads comma-separated rows of key,item[,value[,time]]. A first
// line whose first field is "key" is a header and skipped. Empty value and
// time fields mean none; a time is RFC 3339 or integer Unix nanoseconds.
// Every malformed row is reported (with its line number), all at once.
func ReadRows(r io.Reader) ([]Row, error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.TrimLeadingSpace = true
	cr.ReuseRecord = true
	var rows []Row
	var errs []error
	for line := 1; ; line++ {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, fmt.Errorf("%w: %v", ErrBadRow, err)
		}
		if line == 1 && len(rec) > 0 && strings.EqualFold(strings.TrimSpace(rec[0]), "key") {
			continue
		}
		row, err := parseRow(rec)
		if err != nil {
			errs = append(errs, fmt.Errorf("%w: line %d: %v", ErrBadRow, line, err))
			if len(errs) >= 20 {
				errs = append(errs, fmt.Errorf("%w: stopped after 20 bad rows", ErrBadRow))
				break
			}
			continue
		}
		rows = append(rows, row)
	}
	if len(errs) > 0 {
		return nil, errors.Join(errs...)
	}
	return rows, nil
}

func parseRow(rec []string) (Row, error) {
	if len(rec) < 2 || len(rec) > 4 {
		return Row{}, fmt.Errorf("want key,item[,value[,time]], got %d fields", len(rec))
	}
	r := Row{Key: rec[0], Item: rec[1]}
	if len(rec) > 2 && strings.TrimSpace(rec[2]) != "" {
		v, err := strconv.ParseFloat(strings.TrimSpace(rec[2]), 64)
		if err != nil || math.IsNaN(v) || math.IsInf(v, 0) {
			return Row{}, fmt.Errorf("value %q is not a finite number", rec[2])
		}
		r.Value, r.HasValue = v, true
	}
	if len(rec) > 3 && strings.TrimSpace(rec[3]) != "" {
		s := strings.TrimSpace(rec[3])
		if ns, err := strconv.ParseInt(s, 10, 64); err == nil {
			r.Time = ns
		} else if tt, err := time.Parse(time.RFC3339Nano, s); err == nil {
			r.Time = tt.UnixNano()
		} else {
			return Row{}, fmt.Errorf("time %q is neither RFC 3339 nor integer nanoseconds", rec[3])
		}
		r.HasTime = true
	}
	return r, nil
}

// UserParams are the summary parameters of a report on user rows. Zero
// fields mean the defaults of the feature kinds.
type UserParams struct {
	// Precision of the distinct counts. Default 12.
	Precision uint8
	// Epsilon of the Count-Min sketch. Default 0.01.
	Epsilon float64
	// Capacity of the Space-Saving summary. Default 32.
	Capacity int
	// Alpha, the quantile summary's relative accuracy. Default 0.01.
	Alpha float64
}

// FromRows runs the summaries a feature would keep over the user's rows
// against exact answers: per key, the distinct items (sketch.DistinctEver
// and axiomhq/hyperloglog at the same precision); over all rows, item
// frequencies (Count-Min), heavy items (Space-Saving) and, if rows carry
// values, quantiles of the values. Rows are applied in the given order,
// at their time (or their index when they carry none).
func FromRows(rows []Row, up UserParams) (*Report, error) {
	p := up.Precision
	if p == 0 {
		p = 12
	}
	eps := up.Epsilon
	if eps == 0 {
		eps = 0.01
	}
	m := up.Capacity
	if m == 0 {
		m = 32
	}
	alpha := up.Alpha
	if alpha == 0 {
		alpha = 0.01
	}
	if len(rows) == 0 {
		return nil, fmt.Errorf("%w: no rows", ErrBadRow)
	}
	r := &Report{Title: "tallyward accuracy on your data"}
	type perKey struct {
		ever  *sketch.DistinctEver
		lib   *hyperloglog.Sketch
		exact map[uint64]struct{}
		t     int64
	}
	keys := map[string]*perKey{}
	var keyOrder []string
	hs := make([]uint64, len(rows))
	var vals []float64
	for i, row := range rows {
		h := sketch.HashString(row.Item)
		hs[i] = h
		if row.HasValue {
			vals = append(vals, row.Value)
		}
		k := keys[row.Key]
		if k == nil {
			ev, err := sketch.NewDistinctEver(sketch.DistinctEverSpec{Precision: p})
			if err != nil {
				return nil, err
			}
			lib, err := hyperloglog.NewSketch(p, true)
			if err != nil {
				return nil, err
			}
			k = &perKey{ever: ev, lib: lib, exact: map[uint64]struct{}{}}
			keys[row.Key] = k
			keyOrder = append(keyOrder, row.Key)
		}
		t := int64(i + 1)
		if row.HasTime {
			t = row.Time
		}
		k.ever.Add(t, h)
		k.lib.InsertHash(h)
		k.exact[h] = struct{}{}
		k.t = max(k.t, t)
	}
	r.Notes = append(r.Notes, fmt.Sprintf("%d rows, %d keys, %d rows with a value. Items are hashed with sketch.HashString, as a pipeline hashes them by default.", len(rows), len(keys), len(vals)))

	sigma := 1.04 / math.Sqrt(float64(uint64(1)<<p))
	dt := &Table{
		Title:    "Distinct items per key",
		Measures: fmt.Sprintf("For each key, |estimate - exact| / exact of its number of distinct items, at p=%d, summarized over keys; also over the keys with more than 1000 distinct items, where the dense estimate is used.", p),
		Bound:    "relative standard error sigma = 1.04/sqrt(2^p); checked: the RMS over keys <= sigma * (1 + 3/sqrt(2k)) for k keys (sampling slack).",
		Source:   srcHLL,
		Header:   []string{"summary", "keys", "largest exact", "mean", "p50", "p99", "max", "rms", "allowed rms", "inside"},
		Checked:  true,
	}
	slices.Sort(keyOrder)
	for _, big := range []bool{false, true} {
		for im, name := range []string{implNames[implEver], implNames[implLibrary]} {
			var errsRel []float64
			largest := 0
			for _, key := range keyOrder {
				k := keys[key]
				n := len(k.exact)
				if big && n <= 1000 {
					continue
				}
				largest = max(largest, n)
				est := float64(k.ever.DistinctAt(k.t))
				if im == 1 {
					est = float64(k.lib.Estimate())
				}
				errsRel = append(errsRel, relErr(est, float64(n)))
			}
			if len(errsRel) == 0 {
				continue
			}
			label := name
			if big {
				label += ", keys > 1000 items"
			}
			rm := rms(errsRel)
			s := summarize(errsRel)
			allowed := allowedRMS(sigma, s.N)
			ok := rm <= allowed
			dt.check(ok, "%s: rms %.4f against sigma %.4f (allowed %.4f)", label, rm, sigma, allowed)
			dt.add(label, s.N, largest, s.Mean, s.P50, s.P99, s.Max, rm, allowed, ok)
		}
	}
	r.Tables = append(r.Tables, dt)

	ct := newCountMinTable(fmt.Sprintf("All %d rows' items in one sketch; every distinct item is queried.", len(rows)))
	if err := measureCountMin(ct, "your items", hs, nil, eps, 0.01); err != nil {
		return nil, err
	}
	r.Tables = append(r.Tables, ct)

	st := newSpaceSavingTable(fmt.Sprintf("All %d rows' items in one summary.", len(rows)))
	if err := measureSpaceSaving(st, "your items", hs, m); err != nil {
		return nil, err
	}
	r.Tables = append(r.Tables, st)

	if len(vals) > 0 {
		qt := newQuantileTable(fmt.Sprintf("The %d values of your rows.", len(vals)))
		if err := measureQuantile(qt, "your values", vals, alpha); err != nil {
			return nil, err
		}
		r.Tables = append(r.Tables, qt)
	}
	return r, nil
}
