// Command serveload measures `tallyward serve` under sustained load: many
// concurrent clients send single-event score requests, then 100-event
// batches, to a server it starts as a child process on a free loopback
// port; then the same events go through Live.Score and Live.SubmitBatch
// in this process, as the baseline of the same run. It prints requests/s,
// events/s and latency percentiles per phase, the errors seen (the run
// fails on any), and the server's resident memory over the run.
//
// Run from the module root:
//
//	go run ./bench/serveload -duration 30s -clients 64
//
// Traffic goes only to 127.0.0.1, is bounded in time, and stops by itself.
package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/specfile"
)

func main() {
	dur := flag.Duration("duration", 30*time.Second, "length of each phase")
	clients := flag.Int("clients", 64, "concurrent clients (goroutines in the baseline)")
	batch := flag.Int("batch", 100, "events per batch request")
	spec := flag.String("spec", "cmd/tallyward/testdata/serve.yaml", "spec file")
	bin := flag.String("bin", "", "tallyward binary (default: built from ./cmd/tallyward)")
	queue := flag.Int("queue", 256, "the server's -queue")
	flag.Parse()
	if err := run(*dur, *clients, *batch, *spec, *bin, *queue); err != nil {
		fmt.Fprintln(os.Stderr, "serveload:", err)
		os.Exit(1)
	}
}

// hist is a latency histogram with buckets 1% apart: percentiles are
// within 1% of the exact sample percentile, at constant memory.
type hist struct {
	counts [3000]uint64
	n      uint64
	max    time.Duration
}

const growth = 1.01

func (h *hist) add(d time.Duration) {
	i := 0
	if d > 1 {
		i = min(int(math.Log(float64(d))/math.Log(growth)), len(h.counts)-1)
	}
	h.counts[i]++
	h.n++
	h.max = max(h.max, d)
}

func (h *hist) merge(o *hist) {
	for i, c := range o.counts {
		h.counts[i] += c
	}
	h.n += o.n
	h.max = max(h.max, o.max)
}

// quantile returns the upper edge of the bucket holding the q-quantile.
func (h *hist) quantile(q float64) time.Duration {
	rank := uint64(math.Ceil(q * float64(h.n)))
	var seen uint64
	for i, c := range h.counts {
		seen += c
		if seen >= rank && c > 0 {
			return min(time.Duration(math.Pow(growth, float64(i+1))), h.max)
		}
	}
	return h.max
}

type result struct {
	name             string
	requests, events uint64
	errors           uint64
	firstErr         string
	elapsed          time.Duration
	h                hist
}

func (r *result) print() {
	rps := float64(r.requests) / r.elapsed.Seconds()
	eps := float64(r.events) / r.elapsed.Seconds()
	fmt.Printf("| %-32s | %9d | %10.0f | %10.0f | %9s | %9s | %9s | %6d |\n", r.name, r.requests, rps, eps,
		r.h.quantile(0.5).Round(time.Microsecond/10), r.h.quantile(0.99).Round(time.Microsecond/10),
		r.h.quantile(0.999).Round(time.Microsecond/10), r.errors)
}

// gen makes events: accounts and devices drawn Zipf-distributed from
// seeded generators, one clock shared by all clients so times rise with
// little disorder (each event is 100 us after the one before).
type gen struct {
	base    int64 // Unix ms
	counter atomic.Int64
}

type sample struct {
	ts              int64
	account, device string
	amount          float64
	ok              bool
}

func (g *gen) next(r *rand.Rand, za, zd *rand.Zipf) sample {
	n := g.counter.Add(1)
	return sample{g.base + n/10, "acct-" + strconv.FormatUint(za.Uint64(), 10), "dev-" + strconv.FormatUint(zd.Uint64(), 10),
		float64(r.IntN(50000)) / 100, r.IntN(8) != 0}
}

func appendEvent(b []byte, s sample) []byte {
	b = append(b, `{"ts":`...)
	b = strconv.AppendInt(b, s.ts, 10)
	b = append(b, `,"account":"`...)
	b = append(b, s.account...)
	b = append(b, `","device":"`...)
	b = append(b, s.device...)
	b = append(b, `","amount":`...)
	b = strconv.AppendFloat(b, s.amount, 'f', 2, 64)
	b = append(b, `,"ok":`...)
	b = strconv.AppendBool(b, s.ok)
	return append(b, '}')
}

func run(dur time.Duration, clients, batch int, specPath, bin string, queue int) error {
	tmp, err := os.MkdirTemp("", "serveload-")
	if err != nil {
		return err
	}
	defer os.RemoveAll(tmp)
	if bin == "" {
		bin = filepath.Join(tmp, "tallyward")
		if out, err := exec.Command("go", "build", "-o", bin, "./cmd/tallyward").CombinedOutput(); err != nil {
			return fmt.Errorf("go build: %v\n%s", err, out)
		}
	}
	// Events start 50 minutes ago at 10 per ms: a 30 s phase at 100k
	// events/s moves 5 minutes, so nothing reaches the future-time bound.
	g := &gen{base: time.Now().Add(-50 * time.Minute).UnixMilli()}

	srv, err := startServer(bin, specPath, filepath.Join(tmp, "state"), queue)
	if err != nil {
		return err
	}
	defer srv.kill()

	tr := &http.Transport{MaxIdleConns: clients * 2, MaxIdleConnsPerHost: clients * 2, MaxConnsPerHost: clients * 2}
	hc := &http.Client{Transport: tr, Timeout: 30 * time.Second}
	mem := &memWatch{}
	stopMem := mem.watch(hc, srv.base)

	fmt.Printf("serveload: %d clients, %v per phase, batches of %d, server queue %d, GOMAXPROCS here %d\n\n",
		clients, dur, batch, queue, runtime.GOMAXPROCS(0))
	fmt.Println("| phase                            |  requests |      req/s |   events/s |       p50 |       p99 |     p99.9 | errors |")
	fmt.Println("|---|---|---|---|---|---|---|---|")
	var results []*result
	for _, ph := range []struct {
		name string
		n    int
	}{{"HTTP score, 1 event", 1}, {fmt.Sprintf("HTTP score, %d-event batch", batch), batch}} {
		r := httpPhase(ph.name, hc, srv.base, g, clients, ph.n, dur)
		r.print()
		results = append(results, r)
	}
	stopMem()
	if code := srv.stop(); code != 0 {
		return fmt.Errorf("server exited %d after SIGTERM", code)
	}

	f, err := specfile.Load(specPath)
	if err != nil {
		return err
	}
	opts := f.Options
	opts.Dir = filepath.Join(tmp, "baseline")
	p, err := tallyward.Open(f.Spec, opts)
	if err != nil {
		return err
	}
	live := tallyward.NewLive(p, tallyward.SystemClock{})
	for _, n := range []int{1, batch} {
		name := "in-process Live.Score"
		if n > 1 {
			name = fmt.Sprintf("in-process SubmitBatch, %d", n)
		}
		r := livePhase(name, live, f.Schema, g, clients, n, dur)
		r.print()
		results = append(results, r)
	}
	st := live.Stats()
	var ms runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&ms)
	if err := live.Close(); err != nil {
		return err
	}
	fmt.Printf("\nserver resident memory: %.0f MiB at the first sample, %.0f MiB at most, %.0f MiB at the last (%d samples, 1 per second)\n",
		mem.first/(1<<20), mem.max/(1<<20), mem.last/(1<<20), mem.samples)
	fmt.Printf("of which at most: Go heap in use %.0f MiB, entity records cached %.0f MiB (bounded by the cache size, 256 MiB by default);\n",
		mem.heapMax/(1<<20), mem.stateMax/(1<<20))
	fmt.Printf("requests admitted at once: at most %.0f sampled (bound: -queue %d; memory for them: -queue × -max-body = %d MiB)\n",
		mem.admittedMax, queue, queue)
	fmt.Printf("in-process baseline after its phases: %d entities, records cached %.0f MiB, Go heap in use %.0f MiB after a GC\n",
		st.LiveEntities, float64(st.CachedBytes)/(1<<20), float64(ms.HeapInuse)/(1<<20))
	fmt.Print("resident memory every 5 s (MiB):")
	for _, v := range mem.series {
		fmt.Printf(" %.0f", v/(1<<20))
	}
	fmt.Println()
	for _, r := range results {
		if r.errors > 0 {
			return fmt.Errorf("%s: %d errors, the first: %s", r.name, r.errors, r.firstErr)
		}
	}
	return nil
}

func httpPhase(name string, hc *http.Client, base string, g *gen, clients, n int, dur time.Duration) *result {
	res := &result{name: name}
	var mu sync.Mutex
	var wg sync.WaitGroup
	began := time.Now()
	deadline := began.Add(dur)
	for c := range clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			r := rand.New(rand.NewPCG(uint64(c), uint64(n)))
			za, zd := rand.NewZipf(r, 1.1, 1, 99_999), rand.NewZipf(r, 1.1, 1, 19_999)
			var h hist
			var reqs, evs, errs uint64
			var firstErr string
			var body []byte
			for time.Now().Before(deadline) {
				body = body[:0]
				if n > 1 {
					body = append(body, '[')
				}
				for i := range n {
					if i > 0 {
						body = append(body, ',')
					}
					body = appendEvent(body, g.next(r, za, zd))
				}
				if n > 1 {
					body = append(body, ']')
				}
				t0 := time.Now()
				resp, err := hc.Post(base+"/v1/score", "application/json", bytes.NewReader(body))
				if err == nil {
					_, err = io.Copy(io.Discard, resp.Body)
					resp.Body.Close()
					if err == nil && resp.StatusCode != 200 {
						err = fmt.Errorf("status %d", resp.StatusCode)
					}
				}
				h.add(time.Since(t0))
				reqs++
				if err != nil {
					errs++
					if firstErr == "" {
						firstErr = err.Error()
					}
					continue
				}
				evs += uint64(n)
			}
			mu.Lock()
			res.h.merge(&h)
			res.requests += reqs
			res.events += evs
			res.errors += errs
			if res.firstErr == "" {
				res.firstErr = firstErr
			}
			mu.Unlock()
		}()
	}
	wg.Wait()
	res.elapsed = time.Since(began)
	return res
}

func livePhase(name string, live *tallyward.Live[specfile.Event], schema *specfile.Schema, g *gen, clients, n int, dur time.Duration) *result {
	res := &result{name: name}
	var mu sync.Mutex
	var wg sync.WaitGroup
	began := time.Now()
	deadline := began.Add(dur)
	for c := range clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			r := rand.New(rand.NewPCG(uint64(c), uint64(n)))
			za, zd := rand.NewZipf(r, 1.1, 1, 99_999), rand.NewZipf(r, 1.1, 1, 19_999)
			dec := schema.NewJSONDecoder()
			var h hist
			var reqs, evs, errs uint64
			var firstErr string
			var line []byte
			events := make([]specfile.Event, n)
			var dst []float64
			ctx := context.Background()
			for time.Now().Before(deadline) {
				// Decoding is outside the timing: the baseline is the
				// core through Live, nothing of HTTP or JSON.
				for i := range events {
					line = appendEvent(line[:0], g.next(r, za, zd))
					e, err := dec.Decode(line)
					if err != nil {
						panic(err)
					}
					events[i] = e
				}
				var err error
				t0 := time.Now()
				if n == 1 {
					dst, err = live.Score(ctx, events[0], dst[:0])
				} else {
					_, dst, err = live.SubmitBatch(ctx, events, dst[:0], true)
				}
				h.add(time.Since(t0))
				reqs++
				if err != nil {
					errs++
					if firstErr == "" {
						firstErr = err.Error()
					}
					continue
				}
				evs += uint64(n)
			}
			mu.Lock()
			res.h.merge(&h)
			res.requests += reqs
			res.events += evs
			res.errors += errs
			if res.firstErr == "" {
				res.firstErr = firstErr
			}
			mu.Unlock()
		}()
	}
	wg.Wait()
	res.elapsed = time.Since(began)
	return res
}

// memWatch samples the server's resident memory from its /metrics.
type memWatch struct {
	first, max, last float64
	stateMax         float64 // the pipeline's record cache at most
	heapMax          float64 // Go heap in use at most
	admittedMax      float64 // requests admitted at once, at most
	samples          int
	series           []float64 // resident memory, one sample in five
}

func (m *memWatch) watch(hc *http.Client, base string) (stop func()) {
	done := make(chan struct{})
	finished := make(chan struct{})
	go func() {
		defer close(finished)
		t := time.NewTicker(time.Second)
		defer t.Stop()
		for {
			select {
			case <-done:
				return
			case <-t.C:
			}
			resp, err := hc.Get(base + "/metrics")
			if err != nil {
				continue
			}
			sc := bufio.NewScanner(resp.Body)
			for sc.Scan() {
				if v, ok := strings.CutPrefix(sc.Text(), "process_resident_memory_bytes "); ok {
					f, _ := strconv.ParseFloat(v, 64)
					if m.samples == 0 {
						m.first = f
					}
					if m.samples%5 == 0 {
						m.series = append(m.series, f)
					}
					m.samples++
					m.max, m.last = max(m.max, f), f
				}
				if v, ok := strings.CutPrefix(sc.Text(), "tallyward_state_memory_bytes "); ok {
					f, _ := strconv.ParseFloat(v, 64)
					m.stateMax = max(m.stateMax, f)
				}
				if v, ok := strings.CutPrefix(sc.Text(), "tallyward_http_admitted_requests "); ok {
					f, _ := strconv.ParseFloat(v, 64)
					m.admittedMax = max(m.admittedMax, f)
				}
				if v, ok := strings.CutPrefix(sc.Text(), "go_memstats_heap_inuse_bytes "); ok {
					f, _ := strconv.ParseFloat(v, 64)
					m.heapMax = max(m.heapMax, f)
				}
			}
			resp.Body.Close()
		}
	}()
	return func() { close(done); <-finished }
}

type server struct {
	cmd  *exec.Cmd
	base string
	done chan struct{}
}

func startServer(bin, spec, state string, queue int) (*server, error) {
	cmd := exec.Command(bin, "serve", "-spec", spec, "-state", state, "-addr", "127.0.0.1:0", "-queue", strconv.Itoa(queue))
	cmd.Env = append(os.Environ(), "TALLYWARD_TOKEN=")
	stderr, err := cmd.StderrPipe()
	if err != nil {
		return nil, err
	}
	if err := cmd.Start(); err != nil {
		return nil, err
	}
	s := &server{cmd: cmd, done: make(chan struct{})}
	addr := make(chan string, 1)
	go func() {
		defer close(s.done)
		sc := bufio.NewScanner(stderr)
		for sc.Scan() {
			var m map[string]any
			if json.Unmarshal(sc.Bytes(), &m) != nil || m["level"] != "INFO" {
				fmt.Fprintln(os.Stderr, "server:", sc.Text())
			} else if m["msg"] == "serving" {
				addr <- m["addr"].(string)
			}
		}
	}()
	select {
	case a := <-addr:
		s.base = "http://" + a
		return s, nil
	case <-s.done:
		cmd.Wait()
		return nil, errors.New("server exited before serving")
	case <-time.After(30 * time.Second):
		cmd.Process.Kill()
		return nil, errors.New("server did not start in 30 s")
	}
}

func (s *server) stop() int {
	s.cmd.Process.Signal(syscall.SIGTERM)
	<-s.done
	s.cmd.Wait()
	return s.cmd.ProcessState.ExitCode()
}

func (s *server) kill() {
	if s.cmd.ProcessState == nil {
		s.cmd.Process.Kill()
		s.cmd.Wait()
	}
}
