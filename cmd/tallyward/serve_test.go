package main

import (
	"bufio"
	"bytes"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/json"
	"encoding/pem"
	"fmt"
	"io"
	"math/big"
	"net"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"
	"github.com/stretchr/testify/require"
)

// These tests build the command and run it as a child process on a free
// loopback port (127.0.0.1:0; the bound address is read from its
// "serving" log line), talking HTTP to it as a client would.

// builtBinary returns the command TestMain built for the end-to-end tests
// (its kill points stay inert unless their environment variable is set).
func builtBinary(t *testing.T) string {
	t.Helper()
	return binPath
}

const serveSpec = "testdata/serve.yaml"

// server is one running `tallyward serve` child.
type server struct {
	t     *testing.T
	cmd   *exec.Cmd
	base  string // http://127.0.0.1:PORT
	token string
	logMu sync.Mutex
	log   []map[string]any
	done  chan struct{}
}

// startServe runs the command on state with extra flags and waits until it
// serves (or exits, for tests of refusals to start).
func startServe(t *testing.T, state string, extra ...string) *server {
	t.Helper()
	args := append([]string{"serve", "-spec", serveSpec, "-state", state, "-addr", "127.0.0.1:0"}, extra...)
	cmd := exec.Command(builtBinary(t), args...)
	cmd.Env = append(os.Environ(), "TALLYWARD_TOKEN=")
	stderr, err := cmd.StderrPipe()
	require.NoError(t, err)
	require.NoError(t, cmd.Start())
	s := &server{t: t, cmd: cmd, done: make(chan struct{})}
	addr := make(chan string, 1)
	go func() {
		sc := bufio.NewScanner(stderr)
		for sc.Scan() {
			var m map[string]any
			if json.Unmarshal(sc.Bytes(), &m) != nil {
				m = map[string]any{"msg": sc.Text()}
			}
			s.logMu.Lock()
			s.log = append(s.log, m)
			s.logMu.Unlock()
			if m["msg"] == "serving" {
				addr <- m["addr"].(string)
			}
		}
		close(s.done)
	}()
	t.Cleanup(func() {
		if s.cmd.ProcessState == nil {
			s.cmd.Process.Kill()
			s.cmd.Wait()
		}
	})
	select {
	case a := <-addr:
		s.base = "http://" + a
	case <-s.done:
		t.Fatalf("serve exited before serving: %v", s.logs())
	case <-time.After(30 * time.Second):
		t.Fatal("serve did not start within 30 s")
	}
	return s
}

func (s *server) logs() []map[string]any {
	s.logMu.Lock()
	defer s.logMu.Unlock()
	return append([]map[string]any(nil), s.log...)
}

// stop sends sig and waits for the exit code.
func (s *server) stop(sig syscall.Signal) int {
	s.t.Helper()
	require.NoError(s.t, s.cmd.Process.Signal(sig))
	<-s.done
	err := s.cmd.Wait()
	if ee, ok := err.(*exec.ExitError); ok {
		if ws, ok := ee.Sys().(syscall.WaitStatus); ok && ws.Signaled() {
			return -int(ws.Signal())
		}
		return ee.ExitCode()
	}
	require.NoError(s.t, err)
	return 0
}

var client = &http.Client{Timeout: 30 * time.Second}

// do sends a request and returns the status and decoded JSON body.
func (s *server) do(method, path, body string, hdr ...string) (int, map[string]any, http.Header) {
	s.t.Helper()
	code, b, h := s.raw(method, path, body, hdr...)
	var m map[string]any
	if strings.HasPrefix(h.Get("Content-Type"), "application/json") {
		require.NoError(s.t, json.Unmarshal(b, &m), "%s", b)
	}
	return code, m, h
}

func (s *server) raw(method, path, body string, hdr ...string) (int, []byte, http.Header) {
	s.t.Helper()
	req, err := http.NewRequest(method, s.base+path, strings.NewReader(body))
	require.NoError(s.t, err)
	if s.token != "" {
		req.Header.Set("Authorization", "Bearer "+s.token)
	}
	for i := 0; i+1 < len(hdr); i += 2 {
		req.Header.Set(hdr[i], hdr[i+1])
	}
	resp, err := client.Do(req)
	require.NoError(s.t, err)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	require.NoError(s.t, err)
	return resp.StatusCode, b, resp.Header
}

// base time of the test events: a whole minute, half an hour ago, so no
// event is "in the future" for the server's clock.
func baseMillis() int64 {
	return time.Now().Add(-30 * time.Minute).Truncate(time.Minute).UnixMilli()
}

func serveEvent(ts int64, account, device string, amount float64, ok bool) string {
	return fmt.Sprintf(`{"ts":%d,"account":%q,"device":%q,"amount":%g,"ok":%t}`, ts, account, device, amount, ok)
}

func TestServeEndpoints(t *testing.T) {
	s := startServe(t, t.TempDir())
	b := baseMillis()

	code, m, _ := s.do("GET", "/healthz", "")
	require.Equal(t, 200, code)
	code, m, _ = s.do("GET", "/readyz", "")
	require.Equal(t, 200, code, "%v", m)

	// Score applies and answers, as of the event's time.
	code, m, _ = s.do("POST", "/v1/score", serveEvent(b, "acct-1", "dev-1", 12.5, false))
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, 0.0, m["seq"])
	require.Equal(t, map[string]any{"account.events_1h": 1.0, "account.spend_1h": 12.5, "account.failed_10m": 1.0, "device.accounts_1h": 1.0}, m["features"])

	// A batch of two, scored in order.
	code, m, _ = s.do("POST", "/v1/score", "["+serveEvent(b+1000, "acct-1", "dev-1", 7.5, true)+","+serveEvent(b+2000, "acct-2", "dev-1", 1, true)+"]")
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, 1.0, m["first_seq"])
	rows := m["rows"].([]any)
	require.Len(t, rows, 2)
	require.Equal(t, map[string]any{"account.events_1h": 2.0, "account.spend_1h": 20.0, "account.failed_10m": 1.0, "device.accounts_1h": 1.0}, rows[0])
	require.Equal(t, 2.0, rows[1].(map[string]any)["device.accounts_1h"])

	// Ingest without answers: one event, then a batch.
	code, m, _ = s.do("POST", "/v1/events", serveEvent(b+3000, "acct-1", "dev-2", 1, true))
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, map[string]any{"first_seq": 3.0, "count": 1.0, "committed_seq": m["committed_seq"]}, m)
	code, m, _ = s.do("POST", "/v1/events", "["+serveEvent(b+4000, "acct-3", "dev-2", 2, true)+","+serveEvent(b+5000, "acct-3", "dev-2", 3, true)+"]")
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, 4.0, m["first_seq"])
	require.Equal(t, 2.0, m["count"])

	// Lookup applies nothing: asking twice gives the same answer. As of
	// now, half an hour after the events, the 10-minute window is empty.
	for range 2 {
		code, m, _ = s.do("GET", "/v1/entities/account/acct-1", "")
		require.Equal(t, 200, code, "%v", m)
		require.Equal(t, map[string]any{"events_1h": 3.0, "spend_1h": 21.0, "failed_10m": 0.0}, m["features"])
		require.Equal(t, true, m["exact"])
	}
	// As of a given time (Unix ns or RFC 3339): only events up to it.
	at := (b + 1000) * int64(time.Millisecond)
	code, m, _ = s.do("GET", fmt.Sprintf("/v1/entities/account/acct-1?at=%d", at), "")
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, map[string]any{"events_1h": 2.0, "spend_1h": 20.0, "failed_10m": 1.0}, m["features"])
	code, m, _ = s.do("GET", "/v1/entities/account/acct-1?at="+time.UnixMilli(b).UTC().Format(time.RFC3339Nano), "")
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, 1.0, m["features"].(map[string]any)["events_1h"])
	code, m, _ = s.do("GET", "/v1/entities/device/dev-1", "")
	require.Equal(t, 200, code)
	require.Equal(t, 2.0, m["features"].(map[string]any)["accounts_1h"])
	// A key never seen reads as a new entity.
	code, m, _ = s.do("GET", "/v1/entities/account/nobody", "")
	require.Equal(t, 200, code)
	require.Equal(t, 0.0, m["features"].(map[string]any)["events_1h"])

	// Erase: durable on return, and the key then reads as new.
	code, m, _ = s.do("DELETE", "/v1/entities/account/acct-3", "")
	require.Equal(t, 200, code, "%v", m)
	code, m, _ = s.do("GET", "/v1/entities/account/acct-3", "")
	require.Equal(t, 200, code)
	require.Equal(t, 0.0, m["features"].(map[string]any)["events_1h"])

	code, m, _ = s.do("POST", "/v1/commit", "")
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, 6.0, m["committed_seq"])
	code, m, _ = s.do("GET", "/v1/status", "")
	require.Equal(t, 200, code)
	require.Equal(t, 6.0, m["next_seq"])
	require.Equal(t, 6.0, m["committed_seq"])
	require.Equal(t, 6.0, m["applied"])

	code, body, _ := s.raw("GET", "/metrics", "")
	require.Equal(t, 200, code)
	require.Contains(t, string(body), "tallyward_events_total 6")

	// Unknown entity, endpoint, method.
	code, m, _ = s.do("GET", "/v1/entities/planet/earth", "")
	require.Equal(t, 404, code)
	require.Contains(t, m["error"], "planet")
	code, _, _ = s.do("GET", "/v2/nothing", "")
	require.Equal(t, 404, code)
	code, _, _ = s.do("PUT", "/v1/score", "")
	require.Equal(t, 405, code)

	require.Equal(t, 0, s.stop(syscall.SIGTERM))
	// One log line per non-2xx response.
	refused := 0
	for _, l := range s.logs() {
		if l["msg"] == "request refused" {
			refused++
		}
	}
	require.Equal(t, 3, refused, "404 planet, 404 endpoint, 405")
}

// Bad requests get a 4xx naming what is wrong, and nothing of them
// reaches state: next_seq and the features stay as they were.
func TestServeRefusesBadRequests(t *testing.T) {
	s := startServe(t, t.TempDir(), "-max-body", "4096", "-max-batch", "10")
	b := baseMillis()
	code, m, _ := s.do("POST", "/v1/events", serveEvent(b, "acct-1", "dev-1", 1, true))
	require.Equal(t, 200, code, "%v", m)

	good := serveEvent(b+1000, "acct-1", "dev-1", 1, true)
	for _, c := range []struct {
		name, body string
		code       int
		field      string
		index      float64 // -1: none
	}{
		{"malformed", `{"ts":`, 400, "", -1},
		{"not an object", `42`, 400, "", -1},
		{"empty", ``, 400, "", -1},
		{"unknown field", fmt.Sprintf(`{"ts":%d,"account":"a","device":"d","colour":"red"}`, b), 400, "colour", -1},
		{"wrong type", fmt.Sprintf(`{"ts":%d,"account":"a","device":"d","amount":"ten"}`, b), 400, "amount", -1},
		{"wrong type bool", fmt.Sprintf(`{"ts":%d,"account":"a","device":"d","ok":"yes"}`, b), 400, "ok", -1},
		{"missing required", fmt.Sprintf(`{"ts":%d,"device":"d"}`, b), 400, "account", -1},
		{"missing time", `{"account":"a","device":"d"}`, 400, "ts", -1},
		{"zero time", `{"ts":0,"account":"a","device":"d"}`, 422, "ts", -1},
		{"future time", serveEvent(time.Now().Add(3*time.Hour).UnixMilli(), "a", "d", 1, true), 422, "ts", -1},
		{"late", serveEvent(b-60_000, "a", "d", 1, true), 422, "ts", -1},
		{"batch with a bad third event", "[" + good + "," + good + `,{"ts":0,"account":"a","device":"d"}]`, 422, "ts", 2},
		{"batch with a malformed event", "[" + good + `,{"ts":1,"account":7,"device":"d"}]`, 400, "account", 1},
		{"batch too long", "[" + strings.Repeat(good+",", 10) + good + "]", 413, "", -1},
		{"body too large", "[" + strings.Repeat(" ", 5000) + good + "]", 413, "", -1},
	} {
		for _, path := range []string{"/v1/events", "/v1/score"} {
			code, m, _ := s.do("POST", path, c.body)
			require.Equal(t, c.code, code, "%s %s: %v", c.name, path, m)
			require.NotEmpty(t, m["error"], c.name)
			if c.field != "" {
				require.Equal(t, c.field, m["field"], "%s: %v", c.name, m)
				require.Contains(t, m["error"], c.field, c.name)
			}
			if c.index >= 0 {
				require.Equal(t, c.index, m["index"], c.name)
			}
		}
	}
	// Bad query parameters of a lookup.
	code, m, _ = s.do("GET", "/v1/entities/account/acct-1?at=yesterday", "")
	require.Equal(t, 400, code)
	require.Equal(t, "at", m["field"])
	code, m, _ = s.do("GET", "/v1/entities/account/acct-1?when=1", "")
	require.Equal(t, 400, code)
	require.Equal(t, "when", m["field"])

	code, m, _ = s.do("GET", "/v1/status", "")
	require.Equal(t, 200, code)
	require.Equal(t, 1.0, m["next_seq"], "no refused event was consumed")
	require.Equal(t, 1.0, m["events"])
	code, m, _ = s.do("GET", "/v1/entities/account/acct-1", "")
	require.Equal(t, 200, code)
	require.Equal(t, 1.0, m["features"].(map[string]any)["events_1h"])
	code, m, _ = s.do("GET", "/v1/entities/account/a", "")
	require.Equal(t, 200, code)
	require.Equal(t, 0.0, m["features"].(map[string]any)["events_1h"])
	require.Equal(t, 0, s.stop(syscall.SIGINT))
}

// Off loopback a token is required before anything is bound; with a
// token, every endpoint but health and readiness needs it.
func TestServeToken(t *testing.T) {
	cmd := exec.Command(builtBinary(t), "serve", "-spec", serveSpec, "-state", t.TempDir(), "-addr", "0.0.0.0:0")
	cmd.Env = append(os.Environ(), "TALLYWARD_TOKEN=")
	out, err := cmd.CombinedOutput()
	require.Error(t, err)
	require.Equal(t, exitUsage, cmd.ProcessState.ExitCode())
	require.Contains(t, string(out), "token is required")

	tokFile := filepath.Join(t.TempDir(), "token")
	require.NoError(t, os.WriteFile(tokFile, []byte("s3cret-for-tests\n"), 0o600))
	s := startServe(t, t.TempDir(), "-token-file", tokFile)
	b := baseMillis()
	for _, tok := range []string{"", "wrong"} {
		s.token = tok
		for _, r := range [][2]string{{"POST", "/v1/events"}, {"POST", "/v1/score"}, {"GET", "/v1/entities/account/a"},
			{"DELETE", "/v1/entities/account/a"}, {"POST", "/v1/commit"}, {"GET", "/v1/status"}, {"GET", "/metrics"}} {
			code, _, h := s.do(r[0], r[1], serveEvent(b, "a", "d", 1, true))
			require.Equal(t, 401, code, "%v token %q", r, tok)
			require.Contains(t, h.Get("WWW-Authenticate"), "Bearer")
		}
		code, _, _ := s.do("GET", "/healthz", "")
		require.Equal(t, 200, code)
		code, _, _ = s.do("GET", "/readyz", "")
		require.Equal(t, 200, code)
	}
	s.token = "s3cret-for-tests"
	code, m, _ := s.do("POST", "/v1/events", serveEvent(b, "a", "d", 1, true))
	require.Equal(t, 200, code, "%v", m)
	code, m, _ = s.do("GET", "/v1/status", "")
	require.Equal(t, 1.0, m["events"], "unauthenticated requests applied nothing")
	require.Equal(t, 0, s.stop(syscall.SIGTERM))
}

// With the admission bound reached, a request gets 503 with Retry-After
// at once. A request whose body is still arriving holds its slot, which
// makes the bound reachable without timing.
func TestServeQueueFull(t *testing.T) {
	s := startServe(t, t.TempDir(), "-queue", "1")
	pr, pw := io.Pipe()
	req, err := http.NewRequest("POST", s.base+"/v1/events", pr)
	require.NoError(t, err)
	held := make(chan int, 1)
	go func() {
		resp, err := client.Do(req)
		if err != nil {
			held <- -1
			return
		}
		resp.Body.Close()
		held <- resp.StatusCode
	}()
	_, err = pw.Write([]byte(`{"ts":`))
	require.NoError(t, err)
	// Ask (a bounded number of times) until the slow request has been
	// admitted; /metrics itself is not admission-bounded.
	admitted := false
	for range 5000 {
		_, body, _ := s.raw("GET", "/metrics", "")
		if strings.Contains(string(body), "\ntallyward_http_admitted_requests 1\n") {
			admitted = true
			break
		}
	}
	require.True(t, admitted)
	code, m, h := s.do("POST", "/v1/events", serveEvent(baseMillis(), "a", "d", 1, true))
	require.Equal(t, 503, code, "%v", m)
	require.Equal(t, "1", h.Get("Retry-After"))
	require.Contains(t, m["error"], "queue full")

	// Finish the slow request; the slot frees and requests go through.
	fmt.Fprintf(pw, `%d,"account":"a","device":"d"}`, baseMillis())
	pw.Close()
	require.Equal(t, 200, <-held)
	code, m, _ = s.do("POST", "/v1/events", serveEvent(baseMillis()+1, "a", "d", 1, true))
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, 0, s.stop(syscall.SIGTERM))
}

// sender posts events from several goroutines and records what the
// server acknowledged.
type ack struct {
	seq     int64
	account string
	ts      int64
}

// A SIGTERM in the middle of a stream of requests: the server stops
// accepting, answers what it admitted, commits and exits 0; after a
// restart every acknowledged event is there. Automatic commits are off,
// so only the shutdown commit can have saved them.
func TestServeSIGTERMLosesNoAcknowledgedEvent(t *testing.T) {
	state := t.TempDir()
	s := startServe(t, state, "-commit-interval", "0")
	b := baseMillis()
	const clients = 8
	stopAt := 400
	if testing.Short() {
		stopAt = 100
	}
	var (
		mu      sync.Mutex
		acks    []ack
		sentOne = make(chan struct{}, 1<<16)
		wg      sync.WaitGroup
		next    int64
	)
	for g := range clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := 0; ; i++ {
				mu.Lock()
				n := next
				next++
				mu.Unlock()
				acct := fmt.Sprintf("c%d-%d", g, i)
				ts := b + n // one ms apart: never late with 5 s of disorder allowed
				req, _ := http.NewRequest("POST", s.base+"/v1/events", strings.NewReader(serveEvent(ts, acct, "d", 1, true)))
				resp, err := client.Do(req)
				if err != nil {
					return // the server has gone: stop
				}
				var m map[string]any
				json.NewDecoder(resp.Body).Decode(&m)
				resp.Body.Close()
				if resp.StatusCode != 200 {
					t.Errorf("status %d: %v", resp.StatusCode, m)
					return
				}
				mu.Lock()
				acks = append(acks, ack{seq: int64(m["first_seq"].(float64)), account: acct, ts: ts})
				mu.Unlock()
				sentOne <- struct{}{}
			}
		}()
	}
	for range stopAt {
		<-sentOne
	}
	t0 := time.Now()
	require.Equal(t, 0, s.stop(syscall.SIGTERM))
	t.Logf("stopped in %v", time.Since(t0))
	wg.Wait()
	require.GreaterOrEqual(t, len(acks), stopAt)

	s2 := startServe(t, state)
	code, st, _ := s2.do("GET", "/v1/status", "")
	require.Equal(t, 200, code)
	require.GreaterOrEqual(t, st["events"].(float64), float64(len(acks)))
	require.Equal(t, st["next_seq"], st["committed_seq"])
	for _, a := range acks {
		code, m, _ := s2.do("GET", fmt.Sprintf("/v1/entities/account/%s?at=%d", a.account, a.ts*int64(time.Millisecond)), "")
		require.Equal(t, 200, code)
		require.Equal(t, 1.0, m["features"].(map[string]any)["events_1h"], "acknowledged event seq %d (%s) lost", a.seq, a.account)
	}
	t.Logf("%d events acknowledged before and during the drain; %v applied after restart", len(acks), st["events"])
	require.Equal(t, 0, s2.stop(syscall.SIGTERM))
}

// A SIGKILL loses the events acknowledged after the last commit, and only
// those: the restarted server reports committed_seq, and sending again
// every event numbered at or above it, in order, restores exactly the
// state of an uninterrupted run (checked against a count by hand).
func TestServeSIGKILLResumesFromLastCommit(t *testing.T) {
	state := t.TempDir()
	s := startServe(t, state, "-commit-interval", "0")
	b := baseMillis()
	const accounts = 7
	n, commitAt := 300, 200
	if testing.Short() {
		n, commitAt = 60, 40
	}
	events := make([]string, n)
	for i := range events {
		events[i] = serveEvent(b+int64(i)*100, fmt.Sprintf("acct-%d", i%accounts), "d", float64(i%13), i%5 == 0)
	}
	send := func(s *server, from, to int) {
		for i := from; i < to; i++ {
			code, m, _ := s.do("POST", "/v1/events", events[i])
			require.Equal(t, 200, code, "%v", m)
			require.Equal(t, float64(i), m["first_seq"])
		}
	}
	send(s, 0, commitAt)
	code, m, _ := s.do("POST", "/v1/commit", "")
	require.Equal(t, 200, code)
	require.Equal(t, float64(commitAt), m["committed_seq"])
	send(s, commitAt, n)
	require.Equal(t, -int(syscall.SIGKILL), s.stop(syscall.SIGKILL))

	// What the features must read after the first k events, by hand.
	want := func(k int) map[string]map[string]any {
		out := map[string]map[string]any{}
		for a := range accounts {
			cnt, sum := 0.0, 0.0
			for i := a; i < k; i += accounts {
				cnt++
				sum += float64(i % 13)
			}
			out[fmt.Sprintf("acct-%d", a)] = map[string]any{"events_1h": cnt, "spend_1h": sum}
		}
		return out
	}
	check := func(s *server, k int) {
		at := (b + int64(n)*100) * int64(time.Millisecond)
		for acct, w := range want(k) {
			code, m, _ := s.do("GET", fmt.Sprintf("/v1/entities/account/%s?at=%d", acct, at), "")
			require.Equal(t, 200, code)
			f := m["features"].(map[string]any)
			require.Equal(t, w, map[string]any{"events_1h": f["events_1h"], "spend_1h": f["spend_1h"]}, "%s after %d events", acct, k)
		}
	}

	s2 := startServe(t, state, "-commit-interval", "0")
	code, st, _ := s2.do("GET", "/v1/status", "")
	require.Equal(t, 200, code)
	require.Equal(t, float64(commitAt), st["committed_seq"])
	require.Equal(t, float64(commitAt), st["next_seq"])
	require.Equal(t, float64(commitAt), st["events"])
	check(s2, commitAt) // the window after the commit is gone...
	resend := int(st["committed_seq"].(float64))
	send(s2, resend, n) // ...and sent again, it lands on the same numbers
	check(s2, n)
	require.Equal(t, 0, s2.stop(syscall.SIGTERM))
}

// A scrape of /metrics agrees with a tally of what the test sent: every
// event sent is either counted by the pipeline or refused with a reason.
func TestServeMetricsMatchEventsSent(t *testing.T) {
	s := startServe(t, t.TempDir())
	b := baseMillis()
	var applied, batches, singles int
	accounts, devices := map[string]bool{}, map[string]bool{}
	refused := map[string]int{}
	ts := b
	next := func(i int) string {
		ts += 10
		a, d := fmt.Sprintf("acct-%d", i%11), fmt.Sprintf("dev-%d", i%5)
		accounts[a], devices[d] = true, true
		return serveEvent(ts, a, d, float64(i%7), i%3 == 0)
	}
	for i := range 60 {
		path := []string{"/v1/events", "/v1/score"}[i%2]
		switch i % 4 {
		case 0, 1:
			code, m, _ := s.do("POST", path, next(i))
			require.Equal(t, 200, code, "%v", m)
			applied++
			singles++
		case 2:
			evs := make([]string, 1+i%9)
			for j := range evs {
				evs[j] = next(i*10 + j)
			}
			code, m, _ := s.do("POST", path, "["+strings.Join(evs, ",")+"]")
			require.Equal(t, 200, code, "%v", m)
			applied += len(evs)
			batches++
		case 3:
			// Refused: each kind in turn; a refused batch counts all its events.
			switch i % 16 {
			case 3:
				code, _, _ := s.do("POST", path, `{"ts":0,"account":"x","device":"y"}`)
				require.Equal(t, 422, code)
				refused["zero-time"]++
			case 7:
				code, _, _ := s.do("POST", path, "["+serveEvent(ts, "x", "y", 1, true)+","+serveEvent(ts-60_000, "x", "y", 1, true)+"]")
				require.Equal(t, 422, code)
				refused["late"] += 2
			case 11:
				code, _, _ := s.do("POST", path, `{"ts":1,"account":"x","device":"y","extra":1}`)
				require.Equal(t, 400, code)
				refused["malformed"]++
			case 15:
				code, _, _ := s.do("POST", path, serveEvent(time.Now().Add(5*time.Hour).UnixMilli(), "x", "y", 1, true))
				require.Equal(t, 422, code)
				refused["future-time"]++
			}
		}
	}
	_, body, _ := s.raw("GET", "/metrics", "")
	p := expfmt.NewTextParser(model.LegacyValidation)
	mfs, err := p.TextToMetricFamilies(bytes.NewReader(body))
	require.NoError(t, err)
	val := func(name string, labels ...string) float64 {
		mf, ok := mfs[name]
		require.True(t, ok, name)
	next:
		for _, m := range mf.GetMetric() {
			for i := 0; i+1 < len(labels); i += 2 {
				found := false
				for _, lp := range m.GetLabel() {
					if lp.GetName() == labels[i] && lp.GetValue() == labels[i+1] {
						found = true
					}
				}
				if !found {
					continue next
				}
			}
			switch {
			case m.Counter != nil:
				return m.Counter.GetValue()
			case m.Gauge != nil:
				return m.Gauge.GetValue()
			}
		}
		t.Fatalf("%s%v not found", name, labels)
		return 0
	}
	require.Equal(t, float64(applied), val("tallyward_events_total"))
	require.Equal(t, float64(applied), val("tallyward_events_applied_total"))
	require.Equal(t, 0.0, val("tallyward_events_late_total"), "refused requests never reach the pipeline")
	require.Equal(t, 0.0, val("tallyward_events_rejected_total", "reason", "zero-time"))
	require.Equal(t, float64(len(accounts)+len(devices)), val("tallyward_live_entities"))
	for reason, n := range refused {
		require.Equal(t, float64(n), val("tallyward_http_refused_events_total", "reason", reason), reason)
	}
	okRequests := val("tallyward_http_requests_total", "route", "events", "code", "200") + val("tallyward_http_requests_total", "route", "score", "code", "200")
	require.Equal(t, float64(singles+batches), okRequests)
	require.Equal(t, float64(ts)/1e3, val("tallyward_newest_event_time_seconds"))
	require.Equal(t, 5.0, val("tallyward_watermark_lag_seconds"), "max_disorder of the spec")
	require.Greater(t, val("go_goroutines"), 0.0)
	require.Equal(t, 0, s.stop(syscall.SIGTERM))
}

// With -tls-cert and -tls-key the service speaks HTTPS only.
func TestServeTLS(t *testing.T) {
	dir := t.TempDir()
	certFile, keyFile := filepath.Join(dir, "cert.pem"), filepath.Join(dir, "key.pem")
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	require.NoError(t, err)
	tmpl := &x509.Certificate{
		SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "localhost"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		IPAddresses: []net.IP{net.IPv4(127, 0, 0, 1)}, KeyUsage: x509.KeyUsageDigitalSignature,
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth},
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	require.NoError(t, err)
	kb, err := x509.MarshalECPrivateKey(key)
	require.NoError(t, err)
	require.NoError(t, os.WriteFile(certFile, pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der}), 0o600))
	require.NoError(t, os.WriteFile(keyFile, pem.EncodeToMemory(&pem.Block{Type: "EC PRIVATE KEY", Bytes: kb}), 0o600))

	s := startServe(t, t.TempDir(), "-tls-cert", certFile, "-tls-key", keyFile)
	cert, err := x509.ParseCertificate(der)
	require.NoError(t, err)
	pool := x509.NewCertPool()
	pool.AddCert(cert)
	tlsClient := &http.Client{Timeout: 10 * time.Second, Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: pool}}}
	https := strings.Replace(s.base, "http://", "https://", 1)
	resp, err := tlsClient.Post(https+"/v1/score", "application/json", strings.NewReader(serveEvent(baseMillis(), "a", "d", 1, true)))
	require.NoError(t, err)
	resp.Body.Close()
	require.Equal(t, 200, resp.StatusCode)
	resp, err = client.Get(s.base + "/healthz") // plain HTTP to a TLS port
	if err == nil {
		resp.Body.Close()
		require.Equal(t, http.StatusBadRequest, resp.StatusCode)
	}
	require.Equal(t, 0, s.stop(syscall.SIGTERM))
}

// With ?durable=true an acknowledgement means the events are committed:
// a SIGKILL right after loses none of them, with automatic commits off.
func TestServeDurableAcknowledgementSurvivesSIGKILL(t *testing.T) {
	state := t.TempDir()
	s := startServe(t, state, "-commit-interval", "0")
	b := baseMillis()
	n := 40
	var wg sync.WaitGroup
	for c := range 4 { // concurrent waiters share commits
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := c; i < n; i += 4 {
				path := "/v1/events?durable=true"
				if i%2 == 1 {
					path = "/v1/score?durable=true"
				}
				code, m, _ := s.do("POST", path, serveEvent(b+int64(i), fmt.Sprintf("acct-%d", i), "d", 1, true))
				if code != 200 {
					t.Errorf("%d %v", code, m)
				}
			}
		}()
	}
	wg.Wait()
	code, m, _ := s.do("POST", "/v1/events?durable=maybe", serveEvent(b+int64(n), "x", "d", 1, true))
	require.Equal(t, 400, code, "%v", m)
	require.Equal(t, -int(syscall.SIGKILL), s.stop(syscall.SIGKILL))

	s2 := startServe(t, state)
	code, st, _ := s2.do("GET", "/v1/status", "")
	require.Equal(t, 200, code)
	require.Equal(t, float64(n), st["committed_seq"])
	for i := range n {
		code, m, _ := s2.do("GET", fmt.Sprintf("/v1/entities/account/acct-%d", i), "")
		require.Equal(t, 200, code)
		require.Equal(t, 1.0, m["features"].(map[string]any)["events_1h"], "acct-%d", i)
	}
	commits, secs := 0, 0.0
	for _, l := range s.logs() {
		if l["msg"] == "commit" && l["why"] == "durable request" {
			commits++
			secs += l["seconds"].(float64)
		}
	}
	require.Positive(t, commits)
	require.LessOrEqual(t, commits, n)
	t.Logf("%d durable requests, %d commits taking %.3f s in all", n, commits, secs)
	require.Equal(t, 0, s2.stop(syscall.SIGTERM))
}
