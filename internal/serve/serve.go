// Package serve is the HTTP/JSON feature service over one live pipeline:
// what `tallyward serve` runs.
//
// # Endpoints
//
//	POST   /v1/events                   apply one event (a JSON object) or a batch (an array)
//	POST   /v1/score                    apply and return the features, Eager
//	       ...?durable=true             answer once a commit covers the events
//	GET    /v1/entities/{entity}/{key}  an entity key's features as of now, or ?at=
//	DELETE /v1/entities/{entity}/{key}  erase the key (durable on return)
//	POST   /v1/commit                   commit now
//	GET    /v1/status                   sequence numbers, watermark, counters
//	GET    /metrics                     Prometheus metrics
//	GET    /healthz, /readyz            liveness and readiness (no token needed)
//
// # Guarantees
//
// A request is all or nothing: a batch with one malformed, rejected or
// late event is refused whole (4xx naming the event's index and field),
// and nothing of a refused request reaches state or the pipeline's
// counters (refusals are counted in tallyward_http_refused_events_total).
// An acknowledged event is applied; it is durable once a commit covers
// it: every CommitInterval, on POST /v1/commit, on erasure and at
// shutdown. A graceful stop (Run's context ends: SIGTERM) stops accepting,
// drains the requests in flight, commits and returns, so no acknowledged
// event is lost. A crash loses the events acknowledged after the last
// commit: each acknowledgement carries the event's sequence number and
// GET /v1/status reports committed_seq, so a client that keeps what it
// sent since the last commit and sends again every event numbered at or
// above committed_seq after a restart gets each event applied at least
// once (exactly once when it resends them in order and nothing else
// arrives first). A client that cannot keep them asks for ?durable=true:
// the answer then waits for a commit that covers its events (requests
// waiting together share one commit), so an acknowledged event survives
// a crash too.
//
// # Safety
//
// It binds 127.0.0.1 unless told otherwise, and refuses to start on any
// other address without a bearer token. Bodies are limited in size,
// batches in length, and the requests admitted at once (waiting for the
// pipeline or being served) are bounded: past that bound a request gets
// 503 with Retry-After at once, before its body is read, so memory stays
// within about QueueDepth × MaxBodyBytes. Every non-2xx response and
// every commit is one structured log line.
//
// Only Eager pipelines are served: a Settled pipeline holds events that
// a restart can only recover by re-reading a source, and a server has
// none to re-read.
package serve

import (
	"context"
	"crypto/subtle"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/metrics"
)

// Codec turns the JSON object of one event into an E.
type Codec[E any] interface {
	// Decode parses one JSON object. It must refuse unknown keys, missing
	// required fields and wrong types with an error that names the
	// field: a *FieldError, or one with a Field() string method.
	Decode(obj []byte) (E, error)
	// TimeField is the name of the event-time key, to name it when an
	// event is refused for its time.
	TimeField() string
}

// Options configures a Server. The zero value serves on 127.0.0.1:8650
// with no token, no TLS and the limits below.
type Options struct {
	// Addr is the listen address. A host other than a loopback address
	// (127.0.0.0/8, ::1, localhost) requires Token. Default: "127.0.0.1:8650".
	Addr string
	// Token is the bearer token every request except /healthz and
	// /readyz must carry (Authorization: Bearer ...). Empty: none needed,
	// allowed on a loopback address only. Default: "".
	Token string
	// TLSCertFile and TLSKeyFile, both set, serve HTTPS. Default: plain HTTP.
	TLSCertFile, TLSKeyFile string
	// MaxBodyBytes limits a request body; larger ones get 413.
	// Default: 1 MiB.
	MaxBodyBytes int64
	// MaxBatch limits the events of one request. Default: 1000.
	MaxBatch int
	// QueueDepth bounds the requests admitted at once (waiting for the
	// pipeline or being served); more get 503 with Retry-After.
	// Default: 256.
	QueueDepth int
	// RetryAfter is the wait a 503 suggests. Default: 1 s.
	RetryAfter time.Duration
	// CommitInterval is the period of automatic commits (skipped when
	// nothing changed). Negative: commit only on request, erasure and
	// shutdown. Default: 1 s.
	CommitInterval time.Duration
	// DrainTimeout bounds the wait for requests in flight at shutdown;
	// the final commit follows either way. Default: 30 s.
	DrainTimeout time.Duration
	// Logger receives one line per non-2xx response and per commit.
	// Default: discard.
	Logger *slog.Logger
	// Clock tells "now" for lookups without ?at=. Default:
	// tallyward.SystemClock.
	Clock tallyward.Clock
	// MetricsClock times requests and commits for logs and metrics only,
	// never for a decision about data. Default: tallyward.SystemClock.
	MetricsClock tallyward.Clock
}

// EnsureDefaults fills zero fields with their defaults.
func (o *Options) EnsureDefaults() {
	if o.Addr == "" {
		o.Addr = "127.0.0.1:8650"
	}
	if o.MaxBodyBytes == 0 {
		o.MaxBodyBytes = 1 << 20
	}
	if o.MaxBatch == 0 {
		o.MaxBatch = 1000
	}
	if o.QueueDepth == 0 {
		o.QueueDepth = 256
	}
	if o.RetryAfter == 0 {
		o.RetryAfter = time.Second
	}
	if o.CommitInterval == 0 {
		o.CommitInterval = time.Second
	}
	if o.DrainTimeout == 0 {
		o.DrainTimeout = 30 * time.Second
	}
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
	if o.Clock == nil {
		o.Clock = tallyward.SystemClock{}
	}
	if o.MetricsClock == nil {
		o.MetricsClock = tallyward.SystemClock{}
	}
}

// since is the metrics-clock time since began (Unix ns), for logs and
// metrics.
func (s *Server[E]) since(began int64) time.Duration {
	return time.Duration(s.opts.MetricsClock.Now() - began)
}

// Validate reports every problem with o at once.
func (o *Options) Validate() error {
	var errs []error
	host, _, err := net.SplitHostPort(o.Addr)
	if err != nil {
		errs = append(errs, fmt.Errorf("serve: Addr %q: %w", o.Addr, err))
	} else if !IsLoopback(host) && o.Token == "" {
		errs = append(errs, fmt.Errorf("serve: Addr %q is not a loopback address: a bearer token is required (token file or environment variable)", o.Addr))
	}
	if (o.TLSCertFile == "") != (o.TLSKeyFile == "") {
		errs = append(errs, errors.New("serve: TLS needs both a certificate and a key file"))
	}
	if o.MaxBodyBytes < 0 {
		errs = append(errs, fmt.Errorf("serve: MaxBodyBytes %d < 0", o.MaxBodyBytes))
	}
	if o.MaxBatch < 0 {
		errs = append(errs, fmt.Errorf("serve: MaxBatch %d < 0", o.MaxBatch))
	}
	if o.QueueDepth < 0 {
		errs = append(errs, fmt.Errorf("serve: QueueDepth %d < 0", o.QueueDepth))
	}
	if o.RetryAfter < 0 || o.DrainTimeout < 0 {
		errs = append(errs, errors.New("serve: RetryAfter and DrainTimeout must not be negative"))
	}
	return errors.Join(errs...)
}

// IsLoopback reports whether host (a name or an address without port)
// is a loopback address. The empty host, which listens on every
// interface, is not.
func IsLoopback(host string) bool {
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// Server serves one live pipeline.
type Server[E any] struct {
	live  *tallyward.Live[E]
	codec Codec[E]
	opts  Options
	log   *slog.Logger

	names   []byte   // JSON-quoted feature names, for rows
	quoted  [][]byte // the same, one per feature
	ents    map[string]entityInfo
	admit   chan struct{}
	ready   atomic.Bool
	failed  atomic.Pointer[error]
	fail    chan struct{} // closed on a storage failure
	failOne sync.Once

	commitMu  sync.Mutex // one commit at a time, so their log lines are ordered
	committed atomic.Uint64
	// durable: requests waiting for a commit. commitNow nudges the
	// committer; committedCh is closed (and replaced) after each commit.
	commitNow   chan struct{}
	committing  atomic.Bool // Run's committer is there to answer commitNow
	waitMu      sync.Mutex
	committedCh chan struct{}

	reg      *prometheus.Registry
	requests *prometheus.CounterVec
	latency  *prometheus.HistogramVec
	refused  *prometheus.CounterVec
	queued   prometheus.Gauge
	handler  http.Handler
}

type entityInfo struct {
	features [][]byte // JSON-quoted names
}

// New returns a Server over live. live's pipeline must be Eager.
func New[E any](live *tallyward.Live[E], codec Codec[E], opts Options) (*Server[E], error) {
	opts.EnsureDefaults()
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	s := &Server[E]{live: live, codec: codec, opts: opts, log: opts.Logger,
		admit: make(chan struct{}, opts.QueueDepth), fail: make(chan struct{}), ents: map[string]entityInfo{},
		commitNow: make(chan struct{}, 1), committedCh: make(chan struct{})}
	for _, n := range live.Names() {
		s.quoted = append(s.quoted, strconv.AppendQuote(nil, n))
	}
	ents, feats := live.Entities()
	for i, e := range ents {
		var info entityInfo
		for _, f := range feats[i] {
			info.features = append(info.features, strconv.AppendQuote(nil, f))
		}
		s.ents[e] = info
	}
	s.committed.Store(live.ResumeSeq())

	s.reg = prometheus.NewRegistry()
	s.requests = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "tallyward_http_requests_total",
		Help: "HTTP requests by route and status code."}, []string{"route", "code"})
	s.latency = prometheus.NewHistogramVec(prometheus.HistogramOpts{Name: "tallyward_http_request_duration_seconds",
		Help: "HTTP request latency by route, from admission to response.", Buckets: prometheus.ExponentialBuckets(0.0001, 2.5, 12)}, []string{"route"})
	s.refused = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "tallyward_http_refused_events_total",
		Help: "Events in refused requests, by the reason of the event that refused its request (the others are counted as not_sent)."}, []string{"reason"})
	s.queued = prometheus.NewGauge(prometheus.GaugeOpts{Name: "tallyward_http_admitted_requests",
		Help: "Requests admitted and not yet answered (bounded by the queue depth)."})
	s.reg.MustRegister(metrics.New(live, metrics.Options{}), s.requests, s.latency, s.refused, s.queued,
		collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))

	mux := http.NewServeMux()
	s.route(mux, "POST /v1/events", "events", true, s.handleIngest(false))
	s.route(mux, "POST /v1/score", "score", true, s.handleIngest(true))
	s.route(mux, "GET /v1/entities/{entity}/{key}", "lookup", true, s.handleLookup)
	s.route(mux, "DELETE /v1/entities/{entity}/{key}", "erase", true, s.handleErase)
	s.route(mux, "POST /v1/commit", "commit", true, s.handleCommit)
	s.route(mux, "GET /v1/status", "status", false, s.handleStatus)
	s.route(mux, "GET /healthz", "healthz", false, func(w http.ResponseWriter, r *http.Request) *apiError {
		writeJSON(w, http.StatusOK, []byte(`{"ok":true}`))
		return nil
	})
	s.route(mux, "GET /readyz", "readyz", false, s.handleReady)
	metricsHandler := promhttp.HandlerFor(s.reg, promhttp.HandlerOpts{})
	s.route(mux, "GET /metrics", "metrics", false, func(w http.ResponseWriter, r *http.Request) *apiError {
		metricsHandler.ServeHTTP(w, r)
		return nil
	})
	s.handler = http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		sw := &statusWriter{ResponseWriter: w, code: http.StatusOK}
		began := s.opts.MetricsClock.Now()
		mux.ServeHTTP(sw, r)
		if sw.code >= 300 && !sw.logged {
			// A refusal of the router itself: 404, or 405 for a known path.
			s.requests.WithLabelValues("other", strconv.Itoa(sw.code)).Inc()
			s.log.Warn("request refused", "method", r.Method, "path", r.URL.Path, "status", sw.code,
				"seconds", s.since(began).Seconds(), "remote", r.RemoteAddr)
		}
	})
	s.ready.Store(true)
	return s, nil
}

// Handler returns the server's HTTP handler (for tests and embedding).
func (s *Server[E]) Handler() http.Handler { return s.handler }

// Registry returns the Prometheus registry served at /metrics.
func (s *Server[E]) Registry() *prometheus.Registry { return s.reg }

// apiError is a refused request: its status code and a message naming
// what was wrong.
type apiError struct {
	code  int
	msg   string
	field string
	index int // event index in a batch; -1 if none
	err   error
}

func (e *apiError) body() []byte {
	b := []byte(`{"error":`)
	b = strconv.AppendQuote(b, e.msg)
	if e.field != "" {
		b = append(b, `,"field":`...)
		b = strconv.AppendQuote(b, e.field)
	}
	if e.index >= 0 {
		b = append(b, `,"index":`...)
		b = strconv.AppendInt(b, int64(e.index), 10)
	}
	return append(b, "}\n"...)
}

func badRequest(code int, format string, args ...any) *apiError {
	return &apiError{code: code, msg: fmt.Sprintf(format, args...), index: -1}
}

// route registers a handler behind the token check (if authed), the
// admission bound (for every route but health and metrics) and the
// response log.
func (s *Server[E]) route(mux *http.ServeMux, pattern, name string, admit bool, h func(http.ResponseWriter, *http.Request) *apiError) {
	mux.HandleFunc(pattern, func(w http.ResponseWriter, r *http.Request) {
		began := s.opts.MetricsClock.Now()
		if name != "healthz" && name != "readyz" && !s.authorized(r) {
			w.Header().Set("WWW-Authenticate", `Bearer realm="tallyward"`)
			s.finish(w, r, name, began, badRequest(http.StatusUnauthorized, "missing or wrong bearer token"))
			return
		}
		if admit {
			select {
			case s.admit <- struct{}{}:
				s.queued.Inc()
				defer func() { <-s.admit; s.queued.Dec() }()
			default:
				w.Header().Set("Retry-After", strconv.Itoa(max(1, int(s.opts.RetryAfter.Round(time.Second)/time.Second))))
				s.finish(w, r, name, began, badRequest(http.StatusServiceUnavailable, "queue full (%d requests admitted); retry later", s.opts.QueueDepth))
				return
			}
		}
		s.finish(w, r, name, began, h(w, r))
	})
}

func (s *Server[E]) authorized(r *http.Request) bool {
	if s.opts.Token == "" {
		return true
	}
	const prefix = "Bearer "
	h := r.Header.Get("Authorization")
	if len(h) < len(prefix) || h[:len(prefix)] != prefix {
		return false
	}
	return subtle.ConstantTimeCompare([]byte(h[len(prefix):]), []byte(s.opts.Token)) == 1
}

// finish writes a refusal if there is one, counts the request and logs
// every non-2xx response.
func (s *Server[E]) finish(w http.ResponseWriter, r *http.Request, route string, began int64, e *apiError) {
	code := http.StatusOK
	if e != nil {
		code = e.code
		writeJSON(w, code, e.body())
	}
	d := s.since(began)
	if sw, ok := w.(*statusWriter); ok {
		sw.logged = true
	}
	s.requests.WithLabelValues(route, strconv.Itoa(code)).Inc()
	s.latency.WithLabelValues(route).Observe(d.Seconds())
	if e == nil {
		return
	}
	attrs := []any{"method", r.Method, "path", r.URL.Path, "status", code, "seconds", d.Seconds(), "remote", r.RemoteAddr, "error", e.msg}
	if e.field != "" {
		attrs = append(attrs, "field", e.field)
	}
	if e.index >= 0 {
		attrs = append(attrs, "index", e.index)
	}
	level := slog.LevelWarn
	if code >= 500 && code != http.StatusServiceUnavailable {
		level = slog.LevelError
	}
	s.log.Log(r.Context(), level, "request refused", attrs...)
}

// statusWriter remembers the status code, so that every non-2xx
// response is logged once, whoever wrote it.
type statusWriter struct {
	http.ResponseWriter
	code   int
	logged bool
}

func (w *statusWriter) WriteHeader(code int) {
	w.code = code
	w.ResponseWriter.WriteHeader(code)
}

// Unwrap lets http.ResponseController reach the connection.
func (w *statusWriter) Unwrap() http.ResponseWriter { return w.ResponseWriter }

func writeJSON(w http.ResponseWriter, code int, body []byte) {
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Content-Length", strconv.Itoa(len(body)))
	w.WriteHeader(code)
	w.Write(body)
}

// storageFailure records a failure of the pipeline: the server stops
// being ready and Run returns the error, so a supervisor restarts the
// process, which resumes from the last commit.
func (s *Server[E]) storageFailure(err error) *apiError {
	s.failOne.Do(func() {
		s.failed.Store(&err)
		s.ready.Store(false)
		s.log.Error("pipeline failed; stopping", "error", err)
		close(s.fail)
	})
	return &apiError{code: http.StatusInternalServerError, msg: "pipeline failed: " + err.Error(), index: -1, err: err}
}

func (s *Server[E]) handleReady(w http.ResponseWriter, r *http.Request) *apiError {
	if !s.ready.Load() {
		return badRequest(http.StatusServiceUnavailable, "not ready")
	}
	writeJSON(w, http.StatusOK, []byte(`{"ready":true}`))
	return nil
}

// Commit commits the pipeline and logs one line.
func (s *Server[E]) Commit(ctx context.Context, why string) error {
	s.commitMu.Lock()
	defer s.commitMu.Unlock()
	before := s.committed.Load()
	began := s.opts.MetricsClock.Now()
	if err := s.live.Commit(ctx, nil); err != nil {
		if ctx.Err() == nil {
			s.storageFailure(err)
		}
		return err
	}
	seq := s.noteCommitted()
	s.log.Info("commit", "why", why, "committed_seq", seq, "events", seq-before, "seconds", s.since(began).Seconds())
	return nil
}

// noteCommitted records the position of the last commit and wakes the
// requests waiting for one.
func (s *Server[E]) noteCommitted() uint64 {
	seq := s.live.ResumeSeq()
	for old := s.committed.Load(); old < seq && !s.committed.CompareAndSwap(old, seq); old = s.committed.Load() {
	}
	s.waitMu.Lock()
	close(s.committedCh)
	s.committedCh = make(chan struct{})
	s.waitMu.Unlock()
	return seq
}

// waitCommitted waits until a commit covers every event numbered below
// end, asking the committer for one.
func (s *Server[E]) waitCommitted(ctx context.Context, end uint64) error {
	for s.committed.Load() < end {
		s.waitMu.Lock()
		ch := s.committedCh
		s.waitMu.Unlock()
		if s.committed.Load() >= end {
			return nil
		}
		if !s.committing.Load() { // served through Handler alone
			if err := s.Commit(ctx, "durable request"); err != nil {
				return err
			}
			continue
		}
		select {
		case s.commitNow <- struct{}{}:
		default: // a nudge is already pending
		}
		select {
		case <-ch:
		case <-s.fail:
			return *s.failed.Load()
		case <-ctx.Done():
			return ctx.Err()
		}
	}
	return nil
}

// Run serves until ctx ends or the pipeline fails, then stops accepting,
// drains the requests in flight (up to DrainTimeout), commits and
// returns. It does not close the pipeline. It returns nil after a
// graceful stop.
func (s *Server[E]) Run(ctx context.Context, ln net.Listener) error {
	srv := &http.Server{
		Handler:           s.handler,
		ReadHeaderTimeout: 10 * time.Second,
		ReadTimeout:       30 * time.Second,
		IdleTimeout:       2 * time.Minute,
		MaxHeaderBytes:    64 << 10,
		ErrorLog:          slog.NewLogLogger(s.log.Handler(), slog.LevelWarn),
	}
	served := make(chan error, 1)
	go func() {
		var err error
		if s.opts.TLSCertFile != "" {
			err = srv.ServeTLS(ln, s.opts.TLSCertFile, s.opts.TLSKeyFile)
		} else {
			err = srv.Serve(ln)
		}
		served <- err
	}()
	committerDone := make(chan struct{})
	stopCommitter := make(chan struct{})
	s.committing.Store(true)
	go func() {
		defer close(committerDone)
		defer s.committing.Store(false)
		var tick <-chan time.Time
		if s.opts.CommitInterval > 0 {
			t := time.NewTicker(s.opts.CommitInterval)
			defer t.Stop()
			tick = t.C
		}
		for {
			why := "period"
			select {
			case <-stopCommitter:
				return
			case <-tick:
			case <-s.commitNow:
				why = "durable request"
			}
			if s.live.Stats().NextSeq != s.committed.Load() {
				if s.Commit(context.Background(), why) != nil {
					return
				}
			}
		}
	}()
	s.log.Info("serving", "addr", ln.Addr().String(), "tls", s.opts.TLSCertFile != "", "token", s.opts.Token != "",
		"next_seq", s.live.Stats().NextSeq)

	var runErr error
	select {
	case <-ctx.Done():
		s.log.Info("stopping: draining requests in flight")
	case <-s.fail:
		runErr = *s.failed.Load()
	case err := <-served:
		runErr = fmt.Errorf("serve: %w", err)
	}
	s.ready.Store(false)
	dctx, cancel := context.WithTimeout(context.Background(), s.opts.DrainTimeout)
	defer cancel()
	if err := srv.Shutdown(dctx); err != nil {
		s.log.Warn("drain incomplete; closing connections", "error", err)
		srv.Close()
	}
	close(stopCommitter)
	<-committerDone
	if runErr != nil {
		return runErr
	}
	if err := s.Commit(context.Background(), "shutdown"); err != nil {
		return err
	}
	return nil
}
