package serve

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/tallyward/tallyward"
)

// FieldError is an event refused for one of its fields. Codecs return it
// (wrapped or not) so the response can name the field.
type FieldError struct {
	Field string
	Err   error
}

func (e *FieldError) Error() string {
	if e.Field == "" {
		return e.Err.Error()
	}
	return fmt.Sprintf("field %q: %v", e.Field, e.Err)
}

// Unwrap returns the cause.
func (e *FieldError) Unwrap() error { return e.Err }

// scratch is per-request memory reused across requests.
type scratch[E any] struct {
	body   bytes.Buffer
	events []E
	vals   []float64
	out    []byte
}

// readBody reads the body within the size limit into buf.
func (s *Server[E]) readBody(w http.ResponseWriter, r *http.Request, buf *bytes.Buffer) ([]byte, *apiError) {
	if r.ContentLength > s.opts.MaxBodyBytes {
		return nil, badRequest(http.StatusRequestEntityTooLarge, "body of %d bytes exceeds the limit of %d", r.ContentLength, s.opts.MaxBodyBytes)
	}
	buf.Reset()
	if _, err := buf.ReadFrom(http.MaxBytesReader(w, r.Body, s.opts.MaxBodyBytes)); err != nil {
		var mbe *http.MaxBytesError
		if errors.As(err, &mbe) {
			return nil, badRequest(http.StatusRequestEntityTooLarge, "body exceeds the limit of %d bytes", s.opts.MaxBodyBytes)
		}
		return nil, badRequest(http.StatusBadRequest, "reading the body: %v", err)
	}
	return buf.Bytes(), nil
}

// decode parses a body holding one event object or an array of them.
func (s *Server[E]) decode(body []byte, dst []E) ([]E, bool, *apiError) {
	trimmed := bytes.TrimLeft(body, " \t\r\n")
	if len(trimmed) == 0 {
		return dst, false, badRequest(http.StatusBadRequest, "empty body: send an event object or an array of them")
	}
	if trimmed[0] != '[' {
		e, err := s.codec.Decode(body)
		if err != nil {
			return dst, false, s.decodeError(err, -1, 1)
		}
		return append(dst, e), false, nil
	}
	var raw []json.RawMessage
	if err := json.Unmarshal(trimmed, &raw); err != nil {
		return dst, true, malformed(err)
	}
	if len(raw) == 0 {
		return dst, true, badRequest(http.StatusBadRequest, "empty batch")
	}
	if len(raw) > s.opts.MaxBatch {
		s.refused.WithLabelValues("batch_too_long").Add(float64(len(raw)))
		return dst, true, badRequest(http.StatusRequestEntityTooLarge, "batch of %d events exceeds the limit of %d", len(raw), s.opts.MaxBatch)
	}
	for i, obj := range raw {
		e, err := s.codec.Decode(obj)
		if err != nil {
			return dst, true, s.decodeError(err, i, len(raw))
		}
		dst = append(dst, e)
	}
	return dst, true, nil
}

func malformed(err error) *apiError {
	var se *json.SyntaxError
	if errors.As(err, &se) {
		return badRequest(http.StatusBadRequest, "malformed JSON at byte %d: %v", se.Offset, err)
	}
	return badRequest(http.StatusBadRequest, "malformed JSON: %v", err)
}

func (s *Server[E]) decodeError(err error, index, n int) *apiError {
	s.refused.WithLabelValues("malformed").Add(float64(n))
	e := &apiError{code: http.StatusBadRequest, msg: err.Error(), index: index}
	var fe *FieldError
	if errors.As(err, &fe) {
		e.field = fe.Field
	}
	if index >= 0 {
		e.msg = fmt.Sprintf("event %d: %s", index, e.msg)
	}
	return e
}

// refusal turns SubmitBatch's error into a response.
func (s *Server[E]) refusal(err error, batch bool, n int) *apiError {
	var be *tallyward.BatchError
	if !errors.As(err, &be) {
		if errors.Is(err, context.Canceled) || errors.Is(err, context.DeadlineExceeded) {
			return badRequest(http.StatusServiceUnavailable, "request abandoned before it reached the pipeline: %v", err)
		}
		return s.storageFailure(err)
	}
	e := &apiError{code: http.StatusUnprocessableEntity, index: -1}
	if batch {
		e.index = be.Index
	}
	var re *tallyward.RejectError
	var le *tallyward.LateError
	reason := "other"
	switch {
	case errors.As(be.Err, &re):
		reason = re.Reason.String()
		switch {
		case re.Reason == tallyward.ZeroTime:
			e.field, e.msg = s.codec.TimeField(), "event time is zero"
		case re.Reason == tallyward.FutureTime:
			e.field, e.msg = s.codec.TimeField(), fmt.Sprintf("event time %d is too far ahead of the newest event time or of the server clock", re.Time)
		case re.Feature != "":
			e.field, e.msg = re.Feature, "the value for this feature is refused: "+re.Reason.String()
		default: // any other reason is about the event's time
			e.field, e.msg = s.codec.TimeField(), re.Error()
		}
	case errors.As(be.Err, &le):
		reason = "late"
		e.field, e.msg = s.codec.TimeField(), fmt.Sprintf("event time %d is below the watermark %d (late)", le.Time, le.Watermark)
	case errors.Is(be.Err, tallyward.ErrFlushed):
		reason, e.code, e.msg = "flushed", http.StatusConflict, "the pipeline was flushed and takes no more events"
	default:
		e.msg = be.Err.Error()
	}
	if e.field != "" {
		e.msg = fmt.Sprintf("field %q: %s", e.field, e.msg)
	}
	if batch {
		e.msg = fmt.Sprintf("event %d: %s", be.Index, e.msg)
	}
	e.msg += "; nothing of this request was applied"
	s.refused.WithLabelValues(reason).Add(float64(n))
	return e
}

func (s *Server[E]) handleIngest(score bool) func(http.ResponseWriter, *http.Request) *apiError {
	pool := sync.Pool{New: func() any { return new(scratch[E]) }}
	return func(w http.ResponseWriter, r *http.Request) *apiError {
		durable := false
		for k, v := range r.URL.Query() {
			if k != "durable" || len(v) != 1 || (v[0] != "true" && v[0] != "false") {
				return &apiError{code: http.StatusBadRequest, msg: "unknown query parameter or value: " + k + "=" + strings.Join(v, ","), field: k, index: -1}
			}
			durable = v[0] == "true"
		}
		sc := pool.Get().(*scratch[E])
		defer func() {
			clear(sc.events)
			sc.events, sc.vals, sc.out = sc.events[:0], sc.vals[:0], sc.out[:0]
			if sc.body.Cap() <= 64<<10 { // keep big bodies out of the pool
				pool.Put(sc)
			}
		}()
		body, aerr := s.readBody(w, r, &sc.body)
		if aerr != nil {
			return aerr
		}
		evs, batch, aerr := s.decode(body, sc.events[:0])
		sc.events = evs
		if aerr != nil {
			return aerr
		}
		first, vals, err := s.live.SubmitBatch(r.Context(), evs, sc.vals[:0], score)
		sc.vals = vals
		if err != nil {
			return s.refusal(err, batch, len(evs))
		}
		if durable {
			if err := s.waitCommitted(r.Context(), first+uint64(len(evs))); err != nil {
				// Applied but not known durable: the client must treat
				// the events as unacknowledged.
				return &apiError{code: http.StatusServiceUnavailable, msg: "applied, but no commit covered it before the request ended: " + err.Error(), index: -1}
			}
		}
		out := sc.out[:0]
		switch {
		case !score:
			out = append(out, `{"first_seq":`...)
			out = strconv.AppendUint(out, first, 10)
			out = append(out, `,"count":`...)
			out = strconv.AppendInt(out, int64(len(evs)), 10)
			out = append(out, `,"committed_seq":`...)
			out = strconv.AppendUint(out, s.committed.Load(), 10)
			out = append(out, "}\n"...)
		case !batch:
			out = append(out, `{"seq":`...)
			out = strconv.AppendUint(out, first, 10)
			out = append(out, `,"features":`...)
			out = appendFeatures(out, s.quoted, vals)
			out = append(out, "}\n"...)
		default:
			out = append(out, `{"first_seq":`...)
			out = strconv.AppendUint(out, first, 10)
			out = append(out, `,"rows":[`...)
			n := len(s.quoted)
			for i := range evs {
				if i > 0 {
					out = append(out, ',')
				}
				out = appendFeatures(out, s.quoted, vals[i*n:(i+1)*n])
			}
			out = append(out, "]}\n"...)
		}
		sc.out = out
		writeJSON(w, http.StatusOK, out)
		return nil
	}
}

// appendFeatures writes {"name":value,...}; NaN and infinities (an
// absent entity, an empty window's minimum) are written as null.
func appendFeatures(out []byte, names [][]byte, vals []float64) []byte {
	out = append(out, '{')
	for i, v := range vals {
		if i > 0 {
			out = append(out, ',')
		}
		out = append(out, names[i]...)
		out = append(out, ':')
		out = appendFloat(out, v)
	}
	return append(out, '}')
}

func appendFloat(out []byte, v float64) []byte {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return append(out, "null"...)
	}
	return strconv.AppendFloat(out, v, 'g', -1, 64)
}

// parseTime reads a time as Unix nanoseconds or RFC 3339.
func parseTime(s string) (int64, error) {
	if n, err := strconv.ParseInt(s, 10, 64); err == nil {
		return n, nil
	}
	t, err := time.Parse(time.RFC3339Nano, s)
	if err != nil {
		return 0, fmt.Errorf("%q is neither Unix nanoseconds nor an RFC 3339 time", s)
	}
	return t.UnixNano(), nil
}

func (s *Server[E]) handleLookup(w http.ResponseWriter, r *http.Request) *apiError {
	entity, key := r.PathValue("entity"), r.PathValue("key")
	info, ok := s.ents[entity]
	if !ok {
		return badRequest(http.StatusNotFound, "unknown entity %q", entity)
	}
	for k := range r.URL.Query() {
		if k != "at" {
			return &apiError{code: http.StatusBadRequest, msg: "unknown query parameter " + strconv.Quote(k), field: k, index: -1}
		}
	}
	at := s.opts.Clock.Now()
	if q := r.URL.Query().Get("at"); q != "" {
		t, err := parseTime(q)
		if err != nil {
			return &apiError{code: http.StatusBadRequest, msg: "at: " + err.Error(), field: "at", index: -1}
		}
		at = t
	}
	vals, exact, err := s.live.Lookup(r.Context(), entity, key, at, nil)
	if err != nil {
		if errors.Is(err, tallyward.ErrUnknownEntity) {
			return badRequest(http.StatusNotFound, "unknown entity %q", entity)
		}
		if errors.Is(err, context.Canceled) {
			return badRequest(http.StatusServiceUnavailable, "request abandoned: %v", err)
		}
		return s.storageFailure(err)
	}
	out := []byte(`{"entity":`)
	out = strconv.AppendQuote(out, entity)
	out = append(out, `,"key":`...)
	out = strconv.AppendQuote(out, key)
	out = append(out, `,"at":`...)
	out = strconv.AppendInt(out, at, 10)
	out = append(out, `,"exact":`...)
	out = strconv.AppendBool(out, exact)
	out = append(out, `,"features":`...)
	out = appendFeatures(out, info.features, vals)
	out = append(out, "}\n"...)
	writeJSON(w, http.StatusOK, out)
	return nil
}

func (s *Server[E]) handleErase(w http.ResponseWriter, r *http.Request) *apiError {
	entity, key := r.PathValue("entity"), r.PathValue("key")
	if _, ok := s.ents[entity]; !ok {
		return badRequest(http.StatusNotFound, "unknown entity %q", entity)
	}
	if err := s.live.Erase(r.Context(), entity, key); err != nil {
		if errors.Is(err, context.Canceled) {
			return badRequest(http.StatusServiceUnavailable, "request abandoned: %v", err)
		}
		return s.storageFailure(err)
	}
	s.log.Info("commit", "why", "erase", "committed_seq", s.noteCommitted())
	writeJSON(w, http.StatusOK, []byte(`{"erased":true}`+"\n"))
	return nil
}

func (s *Server[E]) handleCommit(w http.ResponseWriter, r *http.Request) *apiError {
	if err := s.Commit(r.Context(), "request"); err != nil {
		if errors.Is(err, context.Canceled) {
			return badRequest(http.StatusServiceUnavailable, "request abandoned: %v", err)
		}
		return &apiError{code: http.StatusInternalServerError, msg: "commit failed: " + err.Error(), index: -1}
	}
	out := []byte(`{"committed_seq":`)
	out = strconv.AppendUint(out, s.committed.Load(), 10)
	writeJSON(w, http.StatusOK, append(out, "}\n"...))
	return nil
}

func (s *Server[E]) handleStatus(w http.ResponseWriter, r *http.Request) *apiError {
	st := s.live.Stats()
	out := []byte(`{"next_seq":`)
	out = strconv.AppendUint(out, st.NextSeq, 10)
	out = append(out, `,"committed_seq":`...)
	out = strconv.AppendUint(out, s.committed.Load(), 10)
	out = append(out, `,"events":`...)
	out = strconv.AppendUint(out, st.Events, 10)
	out = append(out, `,"applied":`...)
	out = strconv.AppendUint(out, st.Applied, 10)
	out = append(out, `,"newest":`...)
	out = strconv.AppendInt(out, st.Newest, 10)
	out = append(out, `,"watermark":`...)
	out = strconv.AppendInt(out, st.Watermark, 10)
	out = append(out, `,"live_entities":`...)
	out = strconv.AppendInt(out, st.LiveEntities, 10)
	out = append(out, `,"ready":`...)
	out = strconv.AppendBool(out, s.ready.Load())
	writeJSON(w, http.StatusOK, append(out, "}\n"...))
	return nil
}
