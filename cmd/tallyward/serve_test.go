package main

import (
	"bufio"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// These tests build the command and run it as a child process on a free
// loopback port (127.0.0.1:0; the bound address is read from its
// "serving" log line), talking HTTP to it as a client would.

var (
	buildOnce sync.Once
	binPath   string
	buildErr  error
)

func TestMain(m *testing.M) {
	code := m.Run()
	if binPath != "" {
		os.RemoveAll(filepath.Dir(binPath))
	}
	os.Exit(code)
}

// binary builds the command once per test run.
func binary(t *testing.T) string {
	t.Helper()
	buildOnce.Do(func() {
		dir, err := os.MkdirTemp("", "tallyward-bin-")
		if err != nil {
			buildErr = err
			return
		}
		binPath = filepath.Join(dir, "tallyward")
		out, err := exec.Command("go", "build", "-o", binPath, ".").CombinedOutput()
		if err != nil {
			buildErr = fmt.Errorf("go build: %v\n%s", err, out)
		}
	})
	require.NoError(t, buildErr)
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
	cmd := exec.Command(binary(t), args...)
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
	return time.Now().Add(-30*time.Minute).Truncate(time.Minute).UnixMilli()
}

func ev(ts int64, account, device string, amount float64, ok bool) string {
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
	code, m, _ = s.do("POST", "/v1/score", ev(b, "acct-1", "dev-1", 12.5, false))
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, 0.0, m["seq"])
	require.Equal(t, map[string]any{"account.events_1h": 1.0, "account.spend_1h": 12.5, "account.failed_10m": 1.0, "device.accounts_1h": 1.0}, m["features"])

	// A batch of two, scored in order.
	code, m, _ = s.do("POST", "/v1/score", "["+ev(b+1000, "acct-1", "dev-1", 7.5, true)+","+ev(b+2000, "acct-2", "dev-1", 1, true)+"]")
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, 1.0, m["first_seq"])
	rows := m["rows"].([]any)
	require.Len(t, rows, 2)
	require.Equal(t, map[string]any{"account.events_1h": 2.0, "account.spend_1h": 20.0, "account.failed_10m": 1.0, "device.accounts_1h": 1.0}, rows[0])
	require.Equal(t, 2.0, rows[1].(map[string]any)["device.accounts_1h"])

	// Ingest without answers: one event, then a batch.
	code, m, _ = s.do("POST", "/v1/events", ev(b+3000, "acct-1", "dev-2", 1, true))
	require.Equal(t, 200, code, "%v", m)
	require.Equal(t, map[string]any{"first_seq": 3.0, "count": 1.0, "committed_seq": m["committed_seq"]}, m)
	code, m, _ = s.do("POST", "/v1/events", "["+ev(b+4000, "acct-3", "dev-2", 2, true)+","+ev(b+5000, "acct-3", "dev-2", 3, true)+"]")
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
	code, m, _ := s.do("POST", "/v1/events", ev(b, "acct-1", "dev-1", 1, true))
	require.Equal(t, 200, code, "%v", m)

	good := ev(b+1000, "acct-1", "dev-1", 1, true)
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
		{"future time", ev(time.Now().Add(3*time.Hour).UnixMilli(), "a", "d", 1, true), 422, "ts", -1},
		{"late", ev(b-60_000, "a", "d", 1, true), 422, "ts", -1},
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
	cmd := exec.Command(binary(t), "serve", "-spec", serveSpec, "-state", t.TempDir(), "-addr", "0.0.0.0:0")
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
			code, _, h := s.do(r[0], r[1], ev(b, "a", "d", 1, true))
			require.Equal(t, 401, code, "%v token %q", r, tok)
			require.Contains(t, h.Get("WWW-Authenticate"), "Bearer")
		}
		code, _, _ := s.do("GET", "/healthz", "")
		require.Equal(t, 200, code)
		code, _, _ = s.do("GET", "/readyz", "")
		require.Equal(t, 200, code)
	}
	s.token = "s3cret-for-tests"
	code, m, _ := s.do("POST", "/v1/events", ev(b, "a", "d", 1, true))
	require.Equal(t, 200, code, "%v", m)
	code, m, _ = s.do("GET", "/v1/status", "")
	require.Equal(t, 1.0, m["events"], "unauthenticated requests applied nothing")
	require.Equal(t, 0, s.stop(syscall.SIGTERM))
}
