package httpapi

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"net"
	"net/http"
	"os"
	"runtime"
	"sort"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// loadResult is what one bounded load run measured.
type loadResult struct {
	requests   int
	ok         int
	wall       time.Duration
	p50, p99   time.Duration
	throughput float64 // requests per second
	// cpuPerReq is the process's CPU time (user + system, server and
	// clients together) per request: less sensitive than wall time to
	// other work on the machine.
	cpuPerReq time.Duration
	// stacked is the mean number of model calls per pass (1 without
	// coalescing).
	stacked float64
}

func cpuTime() time.Duration {
	var ru syscall.Rusage
	if syscall.Getrusage(syscall.RUSAGE_SELF, &ru) != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// loadRun sends n integrated-gradients requests (16 trapezoid points on
// the pumps demo), conc at a time, to a server listening on 127.0.0.1 only,
// and checks every answer.
func loadRun(t *testing.T, coalesce bool, n, conc int) loadResult {
	t.Helper()
	m, ref := demoModel(t)
	s, err := New(m, Options{Queue: DefaultQueue, Coalesce: coalesce, Reference: ref})
	require.NoError(t, err)
	defer s.Close()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	url := "http://" + ln.Addr().String() + "/v1/explain"
	ctx, stop := context.WithCancel(context.Background())
	served := make(chan error, 1)
	go func() { served <- Serve(ctx, ln, s, 10*time.Second, nil) }()
	tr := &http.Transport{MaxIdleConnsPerHost: conc}
	client := &http.Client{Transport: tr, Timeout: 60 * time.Second}
	defer tr.CloseIdleConnections()

	var x []float64
	require.NoError(t, json.Unmarshal([]byte(demoSampleJSON(t)), &x))
	lat := make([]time.Duration, n)
	codes := make([]int, n)
	problems := make([]string, n)
	next := make(chan int)
	var wg sync.WaitGroup
	start, cpu0 := time.Now(), cpuTime()
	for range conc {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range next {
				xi := append([]float64(nil), x...)
				xi[i%8] *= 1 + 0.01*float64(i%10)
				body := fmt.Sprintf(`{"inputs":[%s],"steps":16}`, floatsJSON(xi))
				t0 := time.Now()
				resp, err := client.Post(url, "application/json", strings.NewReader(body))
				if err != nil {
					problems[i] = err.Error()
					continue
				}
				raw, err := io.ReadAll(resp.Body)
				resp.Body.Close()
				lat[i] = time.Since(t0)
				codes[i] = resp.StatusCode
				if err != nil {
					problems[i] = err.Error()
					continue
				}
				problems[i] = checkLoadDoc(raw)
			}
		}()
	}
	for i := 0; i < n; i++ {
		next <- i
	}
	close(next)
	wg.Wait()
	wall, cpu := time.Since(start), cpuTime()-cpu0
	stop()
	require.NoError(t, <-served)

	res := loadResult{requests: n, wall: wall, throughput: float64(n) / wall.Seconds(), cpuPerReq: cpu / time.Duration(n), stacked: 1}
	mfs, err := s.metrics.reg.Gather()
	require.NoError(t, err)
	for _, mf := range mfs {
		if h := mf.GetMetric()[0].GetHistogram(); mf.GetName() == "apportion_stacked_calls" && h.GetSampleCount() > 0 {
			res.stacked = h.GetSampleSum() / float64(h.GetSampleCount())
		}
	}
	reported := 0
	for i := range codes {
		if codes[i] == http.StatusOK && problems[i] == "" {
			res.ok++
		} else if reported++; reported <= 3 {
			t.Errorf("request %d: status %d: %.400s", i, codes[i], problems[i])
		}
	}
	sorted := append([]time.Duration(nil), lat...)
	sort.Slice(sorted, func(a, b int) bool { return sorted[a] < sorted[b] })
	res.p50 = sorted[n/2]
	res.p99 = sorted[min(n-1, n*99/100)]
	return res
}

// checkLoadDoc checks one answer: one explanation whose completeness
// report agrees with its own numbers, Σ a_i against F(x) − F(x′)
// (Sundararajan et al. 2017, Proposition 1).
func checkLoadDoc(raw []byte) string {
	var doc explainDoc
	if err := json.Unmarshal(raw, &doc); err != nil {
		return err.Error()
	}
	if len(doc.Explanations) != 1 || doc.Explanations[0].Error != nil || doc.Explanations[0].Completeness == nil {
		return "unexpected document: " + string(raw)
	}
	e := doc.Explanations[0]
	cp := e.Completeness
	want := e.Outputs[*e.Target] - e.BaselineOutputs[*e.Target]
	if math.Abs(cp.Expected-want) > 1e-12 || math.Abs(cp.Sum-sum(e.Attributions)) > 1e-9 || e.Points != 16 {
		return "inconsistent completeness: " + string(raw)
	}
	return ""
}

// loadavg is the 1-minute load average, for the log beside timings.
func loadavg() string {
	b, err := os.ReadFile("/proc/loadavg")
	if err != nil {
		return "unknown"
	}
	return strings.Fields(string(b))[0]
}

func TestServeLoad(t *testing.T) {
	n := 500
	if v, err := strconv.Atoi(os.Getenv("APPORTION_LOAD_REQUESTS")); err == nil && v > 0 {
		n = v
	}
	conc := 16
	if v, err := strconv.Atoi(os.Getenv("APPORTION_LOAD_CONCURRENCY")); err == nil && v > 0 {
		conc = v
	}
	before := runtime.NumGoroutine()
	for _, coalesce := range []bool{false, true} {
		r := loadRun(t, coalesce, n, conc)
		assert.Equal(t, n, r.ok, "every request answered 200 with a consistent document")
		t.Logf("coalesce=%v: %d requests, %d concurrent, GOMAXPROCS %d, load %s: %.0f req/s, p50 %v, p99 %v, CPU %v per request, %.2f calls per pass",
			coalesce, r.requests, conc, runtime.GOMAXPROCS(0), loadavg(), r.throughput,
			r.p50.Round(10*time.Microsecond), r.p99.Round(10*time.Microsecond), r.cpuPerReq.Round(time.Microsecond), r.stacked)
	}
	// No goroutine outlives the servers and the clients (settle wait:
	// closed connections' goroutines exit shortly after Close).
	deadline := time.Now().Add(5 * time.Second)
	for runtime.NumGoroutine() > before && time.Now().Before(deadline) {
		time.Sleep(10 * time.Millisecond)
	}
	if after := runtime.NumGoroutine(); after > before {
		buf := make([]byte, 1<<20)
		t.Errorf("%d goroutines before the load, %d after:\n%s", before, after, buf[:runtime.Stack(buf, true)])
	}
}
