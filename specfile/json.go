package specfile

import (
	"strconv"
	"unicode/utf16"
	"unicode/utf8"
)

// JSONDecoder decodes one JSON object per call into an Event: the format
// of JSON-lines files and of events sent over the wire.
//
// Objects are flat: a declared field holds a string, number, boolean or
// null (null reads as missing). Undeclared keys are skipped whatever they
// hold, nested values included (to a depth of 64). A declared field
// given twice, or nested, rejects the row. Errors are *FieldError values
// wrapping ErrBadSyntax, ErrMissingField, ErrBadField or ErrBadTime; no
// input makes it panic.
//
// A JSONDecoder is not safe for concurrent use; make one per goroutine.
type JSONDecoder struct {
	s    *Schema
	seen []bool
	buf  []byte
}

// NewJSONDecoder returns a decoder for s.
func (s *Schema) NewJSONDecoder() *JSONDecoder {
	return &JSONDecoder{s: s, seen: make([]bool, len(s.Fields))}
}

const maxDepth = 64

type jsonScanner struct {
	b []byte
	i int
}

func syntaxErr(format string, args ...any) error { return fieldErr("", ErrBadSyntax, format, args...) }

func (sc *jsonScanner) ws() {
	for sc.i < len(sc.b) {
		switch sc.b[sc.i] {
		case ' ', '\t', '\r', '\n':
			sc.i++
		default:
			return
		}
	}
}

// Decode decodes one object.
func (d *JSONDecoder) Decode(line []byte) (Event, error) {
	s := d.s
	ev := s.NewEvent()
	clear(d.seen)
	haveTime := false
	sc := jsonScanner{b: line}
	sc.ws()
	if sc.i >= len(sc.b) || sc.b[sc.i] != '{' {
		return Event{}, syntaxErr("expected a JSON object")
	}
	sc.i++
	sc.ws()
	if sc.i < len(sc.b) && sc.b[sc.i] == '}' {
		sc.i++
	} else {
		for {
			sc.ws()
			key, err := d.str(&sc)
			if err != nil {
				return Event{}, err
			}
			sc.ws()
			if sc.i >= len(sc.b) || sc.b[sc.i] != ':' {
				return Event{}, syntaxErr("expected ':' after key at byte %d", sc.i)
			}
			sc.i++
			sc.ws()
			idx, known := s.index[string(key)]
			isTime := !known && string(key) == s.TimeField
			switch {
			case isTime:
				if haveTime {
					return Event{}, fieldErr(s.TimeField, ErrBadSyntax, "given twice")
				}
				t, null, err := d.timeValue(&sc)
				if err != nil {
					return Event{}, err
				}
				if !null {
					ev.Time, haveTime = t, true
				}
			case known:
				if d.seen[idx] {
					return Event{}, fieldErr(s.Fields[idx].Name, ErrBadSyntax, "given twice")
				}
				null, err := d.fieldValue(&sc, &ev, idx)
				if err != nil {
					return Event{}, err
				}
				d.seen[idx] = !null
			default:
				if err := skipValue(&sc, 0); err != nil {
					return Event{}, err
				}
			}
			sc.ws()
			if sc.i >= len(sc.b) {
				return Event{}, syntaxErr("unterminated object")
			}
			if sc.b[sc.i] == ',' {
				sc.i++
				continue
			}
			if sc.b[sc.i] == '}' {
				sc.i++
				break
			}
			return Event{}, syntaxErr("expected ',' or '}' at byte %d", sc.i)
		}
	}
	sc.ws()
	if sc.i != len(sc.b) {
		return Event{}, syntaxErr("trailing data at byte %d", sc.i)
	}
	if !haveTime {
		return Event{}, fieldErr(s.TimeField, ErrMissingField, "")
	}
	if err := s.finish(&ev, d.seen); err != nil {
		return Event{}, err
	}
	return ev, nil
}

// finish checks required fields and gives missing optional ones their
// zero value.
func (s *Schema) finish(ev *Event, seen []bool) error {
	if err := s.Check(seen); err != nil {
		return err
	}
	for i, ok := range seen {
		if !ok && s.Fields[i].Type == Bool {
			ev.Fields[i] = boolValue(false)
		}
	}
	return nil
}

func (d *JSONDecoder) timeValue(sc *jsonScanner) (t int64, null bool, err error) {
	s := d.s
	if sc.i >= len(sc.b) {
		return 0, false, syntaxErr("unterminated object")
	}
	switch c := sc.b[sc.i]; {
	case c == '"':
		str, err := d.str(sc)
		if err != nil {
			return 0, false, err
		}
		t, err := s.TimeText(string(str))
		return t, false, err
	case c == 'n':
		return 0, true, literal(sc, "null")
	case c == '-' || c >= '0' && c <= '9':
		num, err := number(sc)
		if err != nil {
			return 0, false, err
		}
		if s.TimeFormat == RFC3339 || s.TimeFormat == Layout {
			return 0, false, fieldErr(s.TimeField, ErrBadTime, "a number where %s text is expected", s.TimeFormat)
		}
		t, err := s.TimeText(string(num))
		return t, false, err
	}
	return 0, false, fieldErr(s.TimeField, ErrBadTime, "not a string or number")
}

func (d *JSONDecoder) fieldValue(sc *jsonScanner, ev *Event, idx int) (null bool, err error) {
	s := d.s
	if sc.i >= len(sc.b) {
		return false, syntaxErr("unterminated object")
	}
	switch c := sc.b[sc.i]; {
	case c == '"':
		str, err := d.str(sc)
		if err != nil {
			return false, err
		}
		return false, s.SetText(ev, idx, string(str))
	case c == 'n':
		return true, literal(sc, "null")
	case c == 't':
		return false, errOr(literal(sc, "true"), func() error { return s.SetBool(ev, idx, true) })
	case c == 'f':
		return false, errOr(literal(sc, "false"), func() error { return s.SetBool(ev, idx, false) })
	case c == '-' || c >= '0' && c <= '9':
		num, err := number(sc)
		if err != nil {
			return false, err
		}
		if s.Fields[idx].Type == String {
			// Keep the number's text as written: ids stay exact.
			ev.Fields[idx] = Value{Str: string(num)}
			return false, nil
		}
		return false, s.SetText(ev, idx, string(num))
	case c == '{' || c == '[':
		return false, fieldErr(s.Fields[idx].Name, ErrBadField, "nested value")
	}
	return false, syntaxErr("unexpected %q at byte %d", sc.b[sc.i], sc.i)
}

func errOr(err error, then func() error) error {
	if err != nil {
		return err
	}
	return then()
}

func literal(sc *jsonScanner, lit string) error {
	if len(sc.b)-sc.i < len(lit) || string(sc.b[sc.i:sc.i+len(lit)]) != lit {
		return syntaxErr("bad literal at byte %d", sc.i)
	}
	sc.i += len(lit)
	return nil
}

// number scans a JSON number and returns its text.
func number(sc *jsonScanner) ([]byte, error) {
	start := sc.i
	b := sc.b
	if sc.i < len(b) && b[sc.i] == '-' {
		sc.i++
	}
	digits := func() int {
		n := 0
		for sc.i < len(b) && b[sc.i] >= '0' && b[sc.i] <= '9' {
			sc.i++
			n++
		}
		return n
	}
	intStart := sc.i
	if n := digits(); n == 0 || n > 1 && b[intStart] == '0' {
		return nil, syntaxErr("bad number at byte %d", start)
	}
	if sc.i < len(b) && b[sc.i] == '.' {
		sc.i++
		if digits() == 0 {
			return nil, syntaxErr("bad number at byte %d", start)
		}
	}
	if sc.i < len(b) && (b[sc.i] == 'e' || b[sc.i] == 'E') {
		sc.i++
		if sc.i < len(b) && (b[sc.i] == '+' || b[sc.i] == '-') {
			sc.i++
		}
		if digits() == 0 {
			return nil, syntaxErr("bad number at byte %d", start)
		}
	}
	return b[start:sc.i], nil
}

// str scans a JSON string. The result aliases the line or the decoder's
// buffer: copy it before the next call.
func (d *JSONDecoder) str(sc *jsonScanner) ([]byte, error) {
	b := sc.b
	if sc.i >= len(b) || b[sc.i] != '"' {
		return nil, syntaxErr("expected a string at byte %d", sc.i)
	}
	sc.i++
	start := sc.i
	for sc.i < len(b) {
		c := b[sc.i]
		if c == '"' {
			s := b[start:sc.i]
			sc.i++
			return s, nil
		}
		if c == '\\' {
			return d.strSlow(sc, start)
		}
		if c < 0x20 {
			return nil, syntaxErr("control character in string at byte %d", sc.i)
		}
		sc.i++
	}
	return nil, syntaxErr("unterminated string")
}

func (d *JSONDecoder) strSlow(sc *jsonScanner, start int) ([]byte, error) {
	b := sc.b
	out := append(d.buf[:0], b[start:sc.i]...)
	for sc.i < len(b) {
		c := b[sc.i]
		switch {
		case c == '"':
			sc.i++
			d.buf = out
			return out, nil
		case c < 0x20:
			return nil, syntaxErr("control character in string at byte %d", sc.i)
		case c != '\\':
			out = append(out, c)
			sc.i++
			continue
		}
		if sc.i+1 >= len(b) {
			break
		}
		e := b[sc.i+1]
		sc.i += 2
		switch e {
		case '"', '\\', '/':
			out = append(out, e)
		case 'b':
			out = append(out, '\b')
		case 'f':
			out = append(out, '\f')
		case 'n':
			out = append(out, '\n')
		case 'r':
			out = append(out, '\r')
		case 't':
			out = append(out, '\t')
		case 'u':
			r, ok := hex4(b, sc.i)
			if !ok {
				return nil, syntaxErr("bad \\u escape at byte %d", sc.i)
			}
			sc.i += 4
			if utf16.IsSurrogate(r) {
				if r2, ok := hex4(b, sc.i+2); ok && sc.i+1 < len(b) && b[sc.i] == '\\' && b[sc.i+1] == 'u' {
					if dec := utf16.DecodeRune(r, r2); dec != utf8.RuneError {
						sc.i += 6
						r = dec
					} else {
						r = utf8.RuneError
					}
				} else {
					r = utf8.RuneError
				}
			}
			out = utf8.AppendRune(out, r)
		default:
			return nil, syntaxErr("bad escape at byte %d", sc.i-1)
		}
	}
	return nil, syntaxErr("unterminated string")
}

func hex4(b []byte, i int) (rune, bool) {
	if i+4 > len(b) {
		return 0, false
	}
	n, err := strconv.ParseUint(string(b[i:i+4]), 16, 32)
	return rune(n), err == nil
}

// skipValue skips any JSON value of an undeclared key.
func skipValue(sc *jsonScanner, depth int) error {
	if depth > maxDepth {
		return syntaxErr("nested deeper than %d", maxDepth)
	}
	if sc.i >= len(sc.b) {
		return syntaxErr("unterminated object")
	}
	var d JSONDecoder
	switch c := sc.b[sc.i]; {
	case c == '"':
		_, err := d.str(sc)
		return err
	case c == 'n':
		return literal(sc, "null")
	case c == 't':
		return literal(sc, "true")
	case c == 'f':
		return literal(sc, "false")
	case c == '-' || c >= '0' && c <= '9':
		_, err := number(sc)
		return err
	case c == '[' || c == '{':
		closer := byte(']')
		if c == '{' {
			closer = '}'
		}
		sc.i++
		sc.ws()
		if sc.i < len(sc.b) && sc.b[sc.i] == closer {
			sc.i++
			return nil
		}
		for {
			sc.ws()
			if c == '{' {
				if _, err := d.str(sc); err != nil {
					return err
				}
				sc.ws()
				if sc.i >= len(sc.b) || sc.b[sc.i] != ':' {
					return syntaxErr("expected ':' at byte %d", sc.i)
				}
				sc.i++
				sc.ws()
			}
			if err := skipValue(sc, depth+1); err != nil {
				return err
			}
			sc.ws()
			if sc.i >= len(sc.b) {
				return syntaxErr("unterminated value")
			}
			if sc.b[sc.i] == ',' {
				sc.i++
				continue
			}
			if sc.b[sc.i] == closer {
				sc.i++
				return nil
			}
			return syntaxErr("unexpected %q at byte %d", sc.b[sc.i], sc.i)
		}
	}
	return syntaxErr("unexpected %q at byte %d", sc.b[sc.i], sc.i)
}
