package specfile

import (
	"fmt"
	"math"
	"slices"
	"strconv"
)

// conditions compiles a feature's when: list. Every condition must hold.
func (l *loader) conditions(s *Schema, path string, cds []conditionDoc) func(Event) bool {
	var preds []func(Event) bool
	for i := range cds {
		cd := &cds[i]
		cpath := fmt.Sprintf("%s[%d]", path, i)
		fi, ok := l.fieldOf(s, cpath+".field", cd.Field, String, Number, Bool)
		if !ok {
			continue
		}
		if p := l.condition(s, cpath, fi, cd); p != nil {
			preds = append(preds, p)
		}
	}
	return func(e Event) bool {
		for _, p := range preds {
			if !p(e) {
				return false
			}
		}
		return true
	}
}

func (l *loader) condition(s *Schema, path string, fi int, cd *conditionDoc) func(Event) bool {
	ft := s.Fields[fi].Type
	tests := 0
	for _, set := range []bool{cd.Equals != nil, cd.NotEquals != nil, cd.In != nil, cd.NotIn != nil} {
		if set {
			tests++
		}
	}
	cmp := cd.Above != nil || cd.AtLeast != nil || cd.Below != nil || cd.AtMost != nil
	switch {
	case tests == 0 && !cmp:
		l.add(path, "needs one of equals, not_equals, in, not_in, or a comparison (above, at_least, below, at_most)")
		return nil
	case tests > 1 || tests == 1 && cmp:
		l.add(path, "give one of equals, not_equals, in, not_in, or comparisons, not several")
		return nil
	}
	if cmp {
		if ft != Number {
			l.add(path+".field", "comparisons need a number field; %q is %v", s.Fields[fi].Name, ft)
			return nil
		}
		lo, loStrict := math.Inf(-1), false
		hi, hiStrict := math.Inf(1), false
		if cd.Above != nil {
			lo, loStrict = *cd.Above, true
		}
		if cd.AtLeast != nil {
			if cd.Above != nil {
				l.add(path+".at_least", "give above or at_least, not both")
			}
			lo = *cd.AtLeast
		}
		if cd.Below != nil {
			hi, hiStrict = *cd.Below, true
		}
		if cd.AtMost != nil {
			if cd.Below != nil {
				l.add(path+".at_most", "give below or at_most, not both")
			}
			hi = *cd.AtMost
		}
		return func(e Event) bool {
			v := e.Fields[fi].Num
			return (v > lo || !loStrict && v == lo) && (v < hi || !hiStrict && v == hi)
		}
	}
	var list []any
	negate := false
	key := "equals"
	switch {
	case cd.Equals != nil:
		list = []any{cd.Equals}
	case cd.NotEquals != nil:
		list, negate, key = []any{cd.NotEquals}, true, "not_equals"
	case cd.In != nil:
		list, key = cd.In, "in"
	default:
		list, negate, key = cd.NotIn, true, "not_in"
	}
	if ft == String {
		var set []string
		for j, v := range list {
			str, ok := scalarText(v)
			if !ok {
				l.add(fmt.Sprintf("%s.%s[%d]", path, key, j), "not a scalar value")
				continue
			}
			set = append(set, str)
		}
		return func(e Event) bool { return slices.Contains(set, e.Fields[fi].Str) != negate }
	}
	var set []float64
	for j, v := range list {
		n, ok := scalarNumber(v, ft)
		if !ok {
			p := path + "." + key
			if key == "in" || key == "not_in" {
				p = fmt.Sprintf("%s[%d]", p, j)
			}
			l.add(p, "%v is not a %v", v, ft)
			continue
		}
		set = append(set, n)
	}
	return func(e Event) bool { return slices.Contains(set, e.Fields[fi].Num) != negate }
}

func scalarText(v any) (string, bool) {
	switch x := v.(type) {
	case string:
		return x, true
	case bool:
		return strconv.FormatBool(x), true
	case int64:
		return strconv.FormatInt(x, 10), true
	case uint64:
		return strconv.FormatUint(x, 10), true
	case int:
		return strconv.Itoa(x), true
	case float64:
		return strconv.FormatFloat(x, 'g', -1, 64), true
	}
	return "", false
}

func scalarNumber(v any, ft FieldType) (float64, bool) {
	switch x := v.(type) {
	case bool:
		if ft == Bool {
			return boolValue(x).Num, true
		}
	case int64:
		return float64(x), ft == Number
	case uint64:
		return float64(x), ft == Number
	case int:
		return float64(x), ft == Number
	case float64:
		return x, ft == Number
	}
	return 0, false
}
