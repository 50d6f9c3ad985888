package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"log/slog"
	"net"
	"os"
	"os/signal"
	"runtime"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/serve"
	"github.com/tallyward/tallyward/specfile"
)

func init() {
	register(&command{
		name:    "serve",
		summary: "run the features of a spec file as an HTTP/JSON service",
		help: `
usage: tallyward serve -spec FILE -state DIR [flags]

Serves one pipeline (Eager mode) over HTTP/JSON:

  POST   /v1/events                   apply one event (object) or a batch (array)
  POST   /v1/score                    apply and return the features
         ...?durable=true             answer once a commit covers the events
  GET    /v1/entities/ENTITY/KEY      features as of now, or ?at=TIME (applies nothing)
  DELETE /v1/entities/ENTITY/KEY      erase the key, durably
  POST   /v1/commit                   commit now
  GET    /v1/status                   next_seq, committed_seq, watermark, counters
  GET    /metrics                     Prometheus metrics
  GET    /healthz, /readyz            liveness, readiness (no token needed)

Events are flat JSON objects with the spec file's fields; unknown keys,
missing required fields and wrong types are refused (400, naming the
field), as are events the pipeline rejects or finds late (422). A request
is applied whole or not at all.

Safe by default: binds 127.0.0.1; any other address needs a bearer token
(-token-file, or the variable named by -token-env); bodies, batches and
the requests admitted at once are bounded (503 with Retry-After past the
bound). State is committed every -commit-interval, on erasure and at
shutdown: SIGTERM or SIGINT stops accepting, drains the requests in
flight, commits and exits 0. After a crash the service resumes from the
last commit; /v1/status reports committed_seq, and a client that sends
again every event numbered at or above it gets each applied at least
once. With ?durable=true an answer waits for a commit that covers its
events (waiting requests share one), so acknowledged means durable.

Example:
  tallyward serve -spec market.yaml -state ./state
  curl -s localhost:8650/v1/score -d '{"ts":1767225600000,"account":"acct-1","device":"d-9","type":"login","ok":false}'`,
		flags: func(fs *flag.FlagSet) func(*env, []string) int {
			spec, state := specFlag(fs), stateFlag(fs)
			var o serve.Options
			fs.StringVar(&o.Addr, "addr", "127.0.0.1:8650", "listen address; a non-loopback host requires a token")
			tokenFile := fs.String("token-file", "", "file holding the bearer token (first line)")
			tokenEnv := fs.String("token-env", "TALLYWARD_TOKEN", "environment variable holding the bearer token, read when -token-file is not given")
			fs.StringVar(&o.TLSCertFile, "tls-cert", "", "TLS certificate file (with -tls-key: serve HTTPS)")
			fs.StringVar(&o.TLSKeyFile, "tls-key", "", "TLS key file")
			fs.Int64Var(&o.MaxBodyBytes, "max-body", 1<<20, "largest request body, bytes")
			fs.IntVar(&o.MaxBatch, "max-batch", 1000, "most events in one request")
			fs.IntVar(&o.QueueDepth, "queue", 256, "most requests admitted at once (waiting or being served)")
			fs.DurationVar(&o.CommitInterval, "commit-interval", time.Second, "period of automatic commits; 0: only on request, erasure and shutdown")
			fs.DurationVar(&o.DrainTimeout, "drain-timeout", 30*time.Second, "longest wait for requests in flight at shutdown")
			workers := fs.Int("workers", runtime.GOMAXPROCS(0), "goroutines the entity records are split over; concurrent score requests are run together on them")
			logFormat := fs.String("log-format", "json", "log format: json or text (to stderr)")
			logLevel := fs.String("log-level", "info", "least level logged: debug, info, warn, error")
			return func(e *env, args []string) int {
				if len(args) != 0 {
					e.errorf("serve takes no arguments (got %q)", args)
					return exitUsage
				}
				log, err := newLogger(e, *logFormat, *logLevel)
				if err != nil {
					e.errorf("%v", err)
					return exitUsage
				}
				o.Logger = log
				if o.CommitInterval <= 0 {
					o.CommitInterval = -1
				}
				if o.Token, err = readToken(*tokenFile, *tokenEnv); err != nil {
					e.errorf("%v", err)
					return exitUsage
				}
				if err := o.Validate(); err != nil {
					e.errorf("%v", err)
					return exitUsage
				}
				if *state == "" {
					e.errorf("-state is required")
					return exitUsage
				}
				f, code, ok := loadSpec(e, *spec)
				if !ok {
					return code
				}
				if f.Options.Mode != tallyward.Eager {
					e.errorf("serve runs Eager pipelines only (run.mode is %v): a server has no source to re-read the events a Settled pipeline holds across a restart", f.Options.Mode)
					return exitBadSpec
				}
				return runServe(e, f, *state, o, *workers)
			}
		},
	})
}

func newLogger(e *env, format, level string) (*slog.Logger, error) {
	var lv slog.Level
	if err := lv.UnmarshalText([]byte(level)); err != nil {
		return nil, fmt.Errorf("-log-level: %v", err)
	}
	ho := &slog.HandlerOptions{Level: lv}
	switch format {
	case "json":
		return slog.New(slog.NewJSONHandler(e.stderr, ho)), nil
	case "text":
		return slog.New(slog.NewTextHandler(e.stderr, ho)), nil
	}
	return nil, fmt.Errorf("-log-format: %q is not json or text", format)
}

// readToken reads the bearer token from a file (its first line) or, if no
// file is given, from an environment variable. Empty means no token.
func readToken(file, envVar string) (string, error) {
	if file != "" {
		b, err := os.ReadFile(file)
		if err != nil {
			return "", fmt.Errorf("-token-file: %v", err)
		}
		tok, _, _ := strings.Cut(string(b), "\n")
		tok = strings.TrimSpace(tok)
		if tok == "" {
			return "", fmt.Errorf("-token-file %s is empty", file)
		}
		return tok, nil
	}
	if envVar == "" {
		return "", nil
	}
	return strings.TrimSpace(os.Getenv(envVar)), nil
}

func runServe(e *env, f *specfile.File, dir string, o serve.Options, workers int) int {
	ctx, stop := signal.NotifyContext(context.Background(), syscall.SIGTERM, syscall.SIGINT)
	defer stop()
	opts := f.Options
	opts.Logger = o.Logger
	opts.Workers = workers
	p, code, ok := openPipeline(e, f, dir, opts)
	if !ok {
		return code
	}
	live := tallyward.NewLive(p, tallyward.SystemClock{})
	srv, err := serve.New(live, newEventCodec(f.Schema), o)
	if err != nil {
		p.Close()
		e.errorf("%v", err)
		return exitUsage
	}
	ln, err := net.Listen("tcp", o.Addr)
	if err != nil {
		p.Close()
		e.errorf("%v", err)
		return exitFailure
	}
	runErr := srv.Run(ctx, ln)
	closeErr := live.Close()
	if err := errors.Join(runErr, closeErr); err != nil {
		o.Logger.Error("stopped", "error", err)
		return exitFailure
	}
	o.Logger.Info("stopped")
	return exitOK
}

// eventCodec decodes the spec file's events strictly: the flat decoder of
// package specfile checks types and required fields, and a key check
// refuses keys the schema does not declare (the file decoder skips them,
// which suits wide files but would hide a client's typo).
type eventCodec struct {
	schema *specfile.Schema
	known  map[string]bool // declared keys; the time field is known too
	types  map[string]specfile.FieldType
	decs   sync.Pool // *specfile.JSONDecoder: one per goroutine at a time
}

func newEventCodec(s *specfile.Schema) *eventCodec {
	c := &eventCodec{schema: s, known: map[string]bool{s.TimeField: true}, types: map[string]specfile.FieldType{}}
	for _, f := range s.Fields {
		c.known[f.Name] = true
		c.types[f.Name] = f.Type
	}
	c.decs.New = func() any { return s.NewJSONDecoder() }
	return c
}

func (c *eventCodec) TimeField() string { return c.schema.TimeField }

func (c *eventCodec) Decode(obj []byte) (specfile.Event, error) {
	var keys map[string]json.RawMessage
	if err := json.Unmarshal(obj, &keys); err != nil {
		var te *json.UnmarshalTypeError
		if errors.As(err, &te) {
			return specfile.Event{}, errors.New("an event must be a JSON object")
		}
		return specfile.Event{}, fmt.Errorf("malformed JSON: %v", err)
	}
	for k, v := range keys {
		if !c.known[k] {
			return specfile.Event{}, &serve.FieldError{Field: k, Err: errors.New("unknown field")}
		}
		// The file decoder converts between types (a number for a string
		// field reads as its text); a client sending JSON gets the type
		// its schema declares or a refusal.
		if t, ok := c.types[k]; ok && len(v) > 0 && string(v) != "null" && !jsonTypeIs(v[0], t) {
			return specfile.Event{}, &serve.FieldError{Field: k, Err: fmt.Errorf("wrong type: want a JSON %s, got %.40s", jsonTypeName(t), v)}
		}
	}
	d := c.decs.Get().(*specfile.JSONDecoder)
	ev, err := d.Decode(obj)
	c.decs.Put(d)
	if err != nil {
		var fe *specfile.FieldError
		if errors.As(err, &fe) {
			return specfile.Event{}, &serve.FieldError{Field: fe.Field, Err: fe.Err}
		}
		return specfile.Event{}, err
	}
	return ev, nil
}

func jsonTypeIs(first byte, t specfile.FieldType) bool {
	switch t {
	case specfile.String:
		return first == '"'
	case specfile.Number:
		return first == '-' || first >= '0' && first <= '9'
	case specfile.Bool:
		return first == 't' || first == 'f'
	}
	return true
}

func jsonTypeName(t specfile.FieldType) string {
	switch t {
	case specfile.String:
		return "string"
	case specfile.Number:
		return "number"
	case specfile.Bool:
		return "boolean"
	}
	return t.String()
}
