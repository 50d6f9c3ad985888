package serve

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward"
)

// signin is the test event: a sign-in attempt on an invented service.
type signin struct {
	T       int64  `json:"t"`
	Account string `json:"account"`
	Failed  bool   `json:"failed"`
}

// structCodec decodes with encoding/json, refusing unknown keys.
type structCodec struct{}

func (structCodec) TimeField() string { return "t" }

func (structCodec) Decode(obj []byte) (signin, error) {
	var e signin
	d := json.NewDecoder(bytes.NewReader(obj))
	d.DisallowUnknownFields()
	if err := d.Decode(&e); err != nil {
		var te *json.UnmarshalTypeError
		if errors.As(err, &te) {
			return e, &FieldError{Field: te.Field, Err: err}
		}
		if f, ok := strings.CutPrefix(err.Error(), "json: unknown field "); ok {
			return e, &FieldError{Field: strings.Trim(f, `"`), Err: errors.New("unknown field")}
		}
		return e, err
	}
	if d.More() {
		return e, errors.New("trailing data after the object")
	}
	if e.Account == "" {
		return e, &FieldError{Field: "account", Err: errors.New("missing")}
	}
	return e, nil
}

const t0 = int64(1_800_000_000) * int64(time.Second)

type fixedClock int64

func (c fixedClock) Now() int64 { return int64(c) }

func newTestServer(t testing.TB, opts Options) (*Server[signin], *tallyward.Live[signin]) {
	t.Helper()
	p, err := tallyward.Open(tallyward.Spec[signin]{
		Time: func(e signin) int64 { return e.T },
		Entities: []tallyward.Entity[signin]{{
			Name: "account", Key: func(e signin) string { return e.Account },
			Features: []tallyward.Feature[signin]{
				{Name: "all_1h", Kind: tallyward.SlidingCount{Window: time.Hour}},
				{Name: "failed_1h", Kind: tallyward.SlidingCount{Window: time.Hour}, Where: func(e signin) bool { return e.Failed }},
			},
		}},
	}, tallyward.Options{MaxDisorder: time.Minute, CommitEvery: -1, Workers: 2}) // as the serve command runs on two cores
	require.NoError(t, err)
	t.Cleanup(func() { p.Close() })
	live := tallyward.NewLive(p, fixedClock(t0+int64(time.Hour)))
	opts.Clock = fixedClock(t0 + int64(time.Hour))
	s, err := New(live, structCodec{}, opts)
	require.NoError(t, err)
	return s, live
}

func post(t testing.TB, h http.Handler, path, body string) (int, string) {
	req := httptest.NewRequest("POST", path, strings.NewReader(body))
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, req)
	return rec.Code, rec.Body.String()
}

// Many clients at once (run under -race in CI): every event lands once,
// and the features equal a count by hand.
func TestConcurrentClientsAgainstBruteForce(t *testing.T) {
	s, live := newTestServer(t, Options{})
	h := s.Handler()
	const clients, perClient = 8, 200
	var wg sync.WaitGroup
	for c := range clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range perClient {
				// Times are distinct per client and spread over 50 s, well
				// within the minute of disorder allowed.
				ts := t0 + int64(i*clients+c)*int64(25*time.Millisecond)
				body := fmt.Sprintf(`{"t":%d,"account":"acct-%d","failed":%t}`, ts, i%5, i%3 == 0)
				if i%10 == 9 {
					body = "[" + body + "," + fmt.Sprintf(`{"t":%d,"account":"acct-x"}`, ts) + "]"
				}
				code, out := post(t, h, "/v1/score", body)
				if code != 200 {
					t.Errorf("%d %s", code, out)
					return
				}
			}
		}()
	}
	wg.Wait()
	// By hand: per client, i%5 picks the account, i%3==0 marks failures,
	// every tenth request adds one event for acct-x.
	want := map[string][2]float64{}
	for range clients {
		for i := range perClient {
			k := fmt.Sprintf("acct-%d", i%5)
			w := want[k]
			w[0]++
			if i%3 == 0 {
				w[1]++
			}
			want[k] = w
			if i%10 == 9 {
				w := want["acct-x"]
				w[0]++
				want["acct-x"] = w
			}
		}
	}
	for k, w := range want {
		vals, exact, err := live.Lookup(context.Background(), "account", k, t0+int64(time.Minute), nil)
		require.NoError(t, err)
		require.True(t, exact)
		require.Equal(t, w[:], vals, k)
	}
	require.Equal(t, uint64(clients*perClient+clients*perClient/10), live.Stats().Applied)
}

// FuzzIngest: no body makes the service panic, a refused body leaves the
// pipeline untouched, and an accepted one is applied whole.
func FuzzIngest(f *testing.F) {
	for _, seed := range []string{
		`{"t":1800000000000000000,"account":"a"}`,
		`[{"t":1800000000000000000,"account":"a"},{"t":1800000000000000001,"account":"b","failed":true}]`,
		`[{"t":1800000000000000000,"account":"a"},{"t":0,"account":"b"}]`,
		`{"t":"x","account":"a"}`, `{"t":1,"account":"a","zz":1}`, `[`, `[]`, `{}`, `null`, `[1,2]`, `"s"`,
		`{"t":1800000000000000000,"account":"a"} trailing`,
	} {
		f.Add(seed)
	}
	s, live := newTestServer(f, Options{MaxBatch: 20, MaxBodyBytes: 4096})
	h := s.Handler()
	f.Fuzz(func(t *testing.T, body string) {
		before := live.Stats()
		code, out := post(t, h, "/v1/score", body)
		after := live.Stats()
		switch {
		case code == 200:
			var m map[string]any
			require.NoError(t, json.Unmarshal([]byte(out), &m), out)
			require.Greater(t, after.NextSeq, before.NextSeq)
		case code >= 400 && code < 500:
			require.Equal(t, before.NextSeq, after.NextSeq, "refused %d %s but consumed events", code, out)
			require.Equal(t, before.Applied, after.Applied)
			var m map[string]any
			require.NoError(t, json.Unmarshal([]byte(out), &m), out)
			require.NotEmpty(t, m["error"])
		default:
			t.Fatalf("status %d: %s", code, out)
		}
	})
}

// Random bodies from a seeded generator through the same checks, so
// plain `go test` covers more than the seed corpus.
func TestIngestRandomBodies(t *testing.T) {
	s, live := newTestServer(t, Options{MaxBatch: 5})
	h := s.Handler()
	r := rand.New(rand.NewPCG(3, 4))
	parts := []string{`{"t":`, `1800000000000000000`, `0`, `,"account":`, `"a"`, `"b"`, `,"failed":true`, `,"x":1`, `}`, `[`, `]`, `,`, `"`, `null`, `-1`}
	applied := uint64(0)
	for range 3000 {
		var b strings.Builder
		for range 1 + r.IntN(12) {
			b.WriteString(parts[r.IntN(len(parts))])
		}
		before := live.Stats().NextSeq
		code, out := post(t, h, "/v1/events", b.String())
		after := live.Stats().NextSeq
		if code == 200 {
			applied += after - before
			continue
		}
		require.True(t, code == 400 || code == 413 || code == 422, "%d %s for %q", code, out, b.String())
		require.Equal(t, before, after, "refused %q but consumed events", b.String())
	}
	require.Equal(t, applied, live.Stats().Applied)
}

// Options.Validate reports every problem at once.
func TestOptionsValidate(t *testing.T) {
	o := Options{Addr: "0.0.0.0:1", TLSCertFile: "c", MaxBodyBytes: -1, MaxBatch: -1, QueueDepth: -1}
	err := o.Validate()
	for _, want := range []string{"token is required", "TLS needs both", "MaxBodyBytes", "MaxBatch", "QueueDepth"} {
		require.ErrorContains(t, err, want)
	}
	for _, h := range []string{"127.0.0.1", "127.8.9.1", "::1", "localhost"} {
		require.True(t, IsLoopback(h), h)
	}
	for _, h := range []string{"", "0.0.0.0", "10.0.0.1", "::", "example.invalid"} {
		require.False(t, IsLoopback(h), h)
	}
}

// The response body of a refused request is what the log line says.
func TestRefusalIsLoggedOnce(t *testing.T) {
	var buf bytes.Buffer
	var mu sync.Mutex
	log := newSyncLogger(&buf, &mu)
	s, _ := newTestServer(t, Options{Logger: log})
	code, out := post(t, s.Handler(), "/v1/events", `{"t":1,"account":"a","colour":"red"}`)
	require.Equal(t, 400, code)
	require.Contains(t, out, `"field":"colour"`)
	mu.Lock()
	defer mu.Unlock()
	lines := strings.Split(strings.TrimSpace(buf.String()), "\n")
	require.Len(t, lines, 1)
	require.Contains(t, lines[0], `"field":"colour"`)
	require.Contains(t, lines[0], `"status":400`)
}

type lockedWriter struct {
	mu *sync.Mutex
	w  io.Writer
}

func (l lockedWriter) Write(b []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.w.Write(b)
}

func newSyncLogger(w io.Writer, mu *sync.Mutex) *slog.Logger {
	return slog.New(slog.NewJSONHandler(lockedWriter{mu: mu, w: w}, nil))
}

// ?durable=true through the handler alone (no Run, so no committer):
// the request commits itself before answering.
func TestDurableWithoutRun(t *testing.T) {
	s, live := newTestServer(t, Options{})
	code, out := post(t, s.Handler(), "/v1/events?durable=true", `{"t":1800000000000000000,"account":"a"}`)
	require.Equal(t, 200, code, out)
	require.Equal(t, uint64(1), live.ResumeSeq())
	code, out = post(t, s.Handler(), "/v1/events?durable=1", `{"t":1800000000000000000,"account":"a"}`)
	require.Equal(t, 400, code, out)
	require.Contains(t, out, `"field":"durable"`)
}
