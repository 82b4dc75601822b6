package httpapi

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"net/http/httptest"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/testhttp"
	"github.com/apportion/apportion/samples"
)

// syncBuffer is a bytes.Buffer safe for the server's concurrent log writes.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

// demoModel returns the embedded pumps demo model and its reference set.
func demoModel(t testing.TB) (*explain.Model, *explain.Dataset) {
	t.Helper()
	s, err := demo.Get("pumps")
	require.NoError(t, err)
	m, err := explain.Decode(s.Model, "demo:"+s.ModelFile, explain.DecodeOptions{})
	require.NoError(t, err)
	spec, err := m.Input()
	require.NoError(t, err)
	b, err := samples.Read(bytes.NewReader(s.Reference), s.ReferenceFile, spec, m.ReadOptions(false))
	require.NoError(t, err)
	return m, explain.NewDataset("demo:"+s.ReferenceFile, s.Reference, b)
}

// testServer serves the pumps demo, with its reference set, on an
// httptest listener (127.0.0.1), with the serve command's defaults; edit
// changes the options.
func testServer(t testing.TB, edit func(o *Options)) (*Handler, *httptest.Server, *syncBuffer) {
	t.Helper()
	m, ref := demoModel(t)
	logs := &syncBuffer{}
	o := Options{Queue: DefaultQueue, Reference: ref, Logger: slog.New(slog.NewJSONHandler(logs, nil))}
	if edit != nil {
		edit(&o)
	}
	h, err := New(m, o)
	require.NoError(t, err)
	ts := httptest.NewServer(h)
	t.Cleanup(func() {
		ts.Close()
		h.Close()
	})
	return h, ts, logs
}

var (
	post = testhttp.Post
	get  = testhttp.Get
)

// errorOf decodes an error body; every error is {"error": "...",
// "request_id": "..."}.
func errorOf(t *testing.T, body string) string {
	t.Helper()
	var e map[string]string
	require.NoError(t, json.Unmarshal([]byte(body), &e), body)
	require.Len(t, e, 2, body)
	require.NotEmpty(t, e["request_id"], body)
	return e["error"]
}

// demoSampleJSON is the demo's own sample.
func demoSampleJSON(t testing.TB) string {
	t.Helper()
	s, err := demo.Get("pumps")
	require.NoError(t, err)
	var v []float64
	require.NoError(t, json.Unmarshal(s.Sample, &v))
	return string(s.Sample)
}

func floatsJSON(v []float64) string {
	b, _ := json.Marshal(v)
	return string(b)
}

// explainDoc is the part of the explain document these tests read.
type explainDoc struct {
	Method       string `json:"method"`
	Explanations []struct {
		Target          *int      `json:"target"`
		Outputs         []float64 `json:"outputs"`
		Attributions    []float64 `json:"attributions"`
		BaselineOutputs []float64 `json:"baseline_outputs"`
		Completeness    *struct {
			Sum         float64 `json:"sum"`
			Expected    float64 `json:"expected"`
			RelativeGap float64 `json:"relative_gap"`
			Tolerance   float64 `json:"tolerance"`
			OK          bool    `json:"ok"`
		} `json:"completeness"`
		Points int     `json:"points"`
		Error  *string `json:"error"`
	} `json:"explanations"`
}

func sum(v []float64) float64 {
	s := 0.0
	for _, x := range v {
		s += x
	}
	return s
}

func TestServeStatuses(t *testing.T) {
	_, ts, _ := testServer(t, func(o *Options) { o.MaxBody = 1 << 10 })
	sample := strings.TrimSpace(demoSampleJSON(t))

	code, body := get(t, ts.URL+"/healthz")
	assert.Equal(t, http.StatusOK, code, body)

	cases := []struct {
		name, route, body string
		code              int
		says              []string
	}{
		{"malformed JSON", "/v1/explain", `{"inputs": [` + sample, http.StatusBadRequest, []string{"malformed JSON"}},
		{"not an object", "/v1/predict", `[1, 2]`, http.StatusBadRequest, []string{"malformed JSON"}},
		{"unknown field", "/v1/explain", `{"inputs": [` + sample + `], "step": 4}`, http.StatusBadRequest, []string{`unknown field "step"`}},
		{"wrong length", "/v1/explain", `{"inputs": [[1, 2, 3]]}`, http.StatusBadRequest,
			[]string{"sample 0: expected 8 values (shape [8]), got 3 (shape [3])"}},
		{"wrong length predict", "/v1/predict", `{"inputs": [[1, 2, 3, 4, 5, 6, 7, 8, 9]]}`, http.StatusBadRequest,
			[]string{"sample 0: expected 8 values (shape [8]), got 9"}},
		{"NaN token", "/v1/explain", `{"inputs": [[1, 2, 3, NaN, 5, 6, 7, 8]]}`, http.StatusBadRequest, []string{"NaN", "expected finite numbers"}},
		{"Infinity token", "/v1/predict", `{"inputs": [[1, 2, 3, -Infinity, 5, 6, 7, 8]]}`, http.StatusBadRequest, []string{"Infinity", "expected finite numbers"}},
		// 1e999 overflows float64 (IEEE 754 binary64: largest finite ≈ 1.8e308).
		{"overflow", "/v1/explain", `{"inputs": [[1, 2, 3, 1e999, 5, 6, 7, 8]]}`, http.StatusBadRequest, []string{"1e999 is out of the float64 range"}},
		{"unknown method", "/v1/explain", `{"inputs": [` + sample + `], "method": "lime"}`, http.StatusBadRequest,
			[]string{`"method" must be one of gradient (grad), gradient-times-input (grad-input), smoothgrad, integrated-gradients (ig), expected-gradients (expected-grad), shapley, surrogate, occlusion, grad-cam, got "lime"`}},
		{"no inputs", "/v1/explain", `{"method": "grad"}`, http.StatusBadRequest, []string{`"inputs" is required`}},
		{"target out of range", "/v1/explain", `{"inputs": [` + sample + `], "method": "grad", "target": 3}`, http.StatusBadRequest, []string{`"target" must be top or an index from 0 to 2 (output "condition" has 3 values), got 3`}},
		{"file baseline", "/v1/explain", `{"inputs": [` + sample + `], "baseline": "/etc/passwd"}`, http.StatusBadRequest, []string{`"baseline" must be zero, constant:V, mean, median, blur, blur:S or uniform:LO:HI (files are the command line's), got "/etc/passwd"`}},
		{"steps too large", "/v1/explain", `{"inputs": [` + sample + `], "steps": 100000}`, http.StatusBadRequest, []string{`"steps" must be auto, exact, refine or a number from 1 to 65536, got "100000"`}},
		{"flag of another method", "/v1/explain", `{"inputs": [` + sample + `], "noise": 0.2}`, http.StatusBadRequest, []string{`"noise" applies to "method" smoothgrad only, not integrated-gradients`}},
		{"over the limit", "/v1/explain", `{"inputs": [` + strings.Repeat(sample+",", 200) + sample + `]}`, http.StatusRequestEntityTooLarge, []string{"over the limit of 1024 bytes (1KiB)"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			code, hdr, body := post(t, ts.URL+tc.route, tc.body)
			// Status codes: RFC 9110 §15.5.1 (400), §15.5.14 (413).
			assert.Equal(t, tc.code, code, body)
			assert.Equal(t, "application/json", hdr.Get("Content-Type"))
			msg := errorOf(t, body)
			for _, s := range tc.says {
				assert.Contains(t, msg, s)
			}
		})
	}

	// 405 with Allow (RFC 9110 §15.5.6) and 404.
	code, body = get(t, ts.URL+"/v1/explain")
	assert.Equal(t, http.StatusMethodNotAllowed, code)
	assert.Contains(t, errorOf(t, body), "/v1/explain takes POST, got GET")
	code, body = get(t, ts.URL+"/v2/explain")
	assert.Equal(t, http.StatusNotFound, code)
	assert.Contains(t, errorOf(t, body), "no route /v2/explain")
}

// TestServeTooLargeFromContentLength sends only the header of a request
// that announces 1 GB: the server must answer 413 without waiting for the
// body, which never comes.
func TestServeTooLargeFromContentLength(t *testing.T) {
	_, ts, _ := testServer(t, nil)
	conn, err := net.Dial("tcp", ts.Listener.Addr().String())
	require.NoError(t, err)
	defer conn.Close()
	require.NoError(t, conn.SetDeadline(time.Now().Add(10*time.Second)))
	_, err = fmt.Fprintf(conn, "POST /v1/explain HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\nContent-Length: 1000000000\r\n\r\n{")
	require.NoError(t, err)
	resp, err := http.ReadResponse(bufio.NewReader(conn), nil)
	require.NoError(t, err, "no answer before the body: the server waited for it")
	defer resp.Body.Close()
	body, _ := io.ReadAll(resp.Body)
	assert.Equal(t, http.StatusRequestEntityTooLarge, resp.StatusCode)
	assert.Contains(t, errorOf(t, string(body)), "request body of 1000000000 bytes is over the limit of 8388608 bytes (8MiB)")
}

// TestServeTooLargeChunked sends a body without Content-Length (chunked
// transfer coding, RFC 9112 §7.1): the limit is found while reading.
func TestServeTooLargeChunked(t *testing.T) {
	_, ts, _ := testServer(t, func(o *Options) { o.MaxBody = 4 << 10 })
	pr, pw := io.Pipe()
	go func() {
		chunk := []byte(`{"inputs": [` + strings.Repeat(" ", 1000))
		for i := 0; i < 64; i++ {
			if _, err := pw.Write(chunk); err != nil {
				return
			}
		}
		pw.Close()
	}()
	req, err := http.NewRequest(http.MethodPost, ts.URL+"/v1/predict", pr)
	require.NoError(t, err)
	req.ContentLength = -1 // unknown: sent chunked
	resp, err := http.DefaultClient.Do(req)
	require.NoError(t, err)
	defer resp.Body.Close()
	pr.Close()
	body, _ := io.ReadAll(resp.Body)
	assert.Equal(t, http.StatusRequestEntityTooLarge, resp.StatusCode)
	assert.Contains(t, errorOf(t, string(body)), "request body is over the limit of 4096 bytes (4KiB)")
}

// slowExplain is a request that takes about a second on one core: the
// trapezoid rule at 65536 points on four samples, 4096 gradient batches.
func slowExplain(t *testing.T) string {
	sample := strings.TrimSpace(demoSampleJSON(t))
	return `{"inputs":[` + strings.Repeat(sample+",", 3) + sample + `],"steps":65536}`
}

// gauge reads one unlabelled gauge of the server's registry.
func gauge(t *testing.T, s *Handler, name string) float64 {
	t.Helper()
	mfs, err := s.metrics.reg.Gather()
	require.NoError(t, err)
	for _, mf := range mfs {
		if mf.GetName() == name {
			return mf.GetMetric()[0].GetGauge().GetValue()
		}
	}
	t.Fatalf("no metric %s", name)
	return 0
}

// passes is the number of model passes (Forward and Gradient calls that
// reached the network) since the handler started, from its registry.
func passes(t *testing.T, s *Handler) int64 { return counterSum(t, s, "apportion_model_passes_total") }

// counterSum adds up the counters of one metric over their labels.
func counterSum(t *testing.T, s *Handler, name string) int64 {
	t.Helper()
	mfs, err := s.metrics.reg.Gather()
	require.NoError(t, err)
	n := 0.0
	for _, mf := range mfs {
		if mf.GetName() == name {
			for _, m := range mf.GetMetric() {
				n += m.GetCounter().GetValue()
			}
		}
	}
	return int64(n)
}

// waitFor polls cond every 5 ms for up to 10 s.
func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

func TestServeQueueFull(t *testing.T) {
	s, ts, _ := testServer(t, func(o *Options) { o.Workers, o.Queue = 1, 1 })
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	var wg sync.WaitGroup
	send := func() {
		defer wg.Done()
		req, _ := http.NewRequestWithContext(ctx, http.MethodPost, ts.URL+"/v1/explain", strings.NewReader(slowExplain(t)))
		if resp, err := http.DefaultClient.Do(req); err == nil {
			resp.Body.Close()
		}
	}
	wg.Add(1)
	go send()
	waitFor(t, "the worker to take the first request", func() bool { return gauge(t, s, "apportion_requests_in_flight") == 1 })
	wg.Add(1)
	go send()
	waitFor(t, "the second request to wait in the queue", func() bool { return gauge(t, s, "apportion_queue_depth") == 1 })

	code, hdr, body := post(t, ts.URL+"/v1/explain", slowExplain(t))
	// 503 with Retry-After in delay-seconds (RFC 9110 §15.6.4, §10.2.3).
	assert.Equal(t, http.StatusServiceUnavailable, code)
	assert.Equal(t, strconv.Itoa(retryAfter), hdr.Get("Retry-After"))
	assert.Contains(t, errorOf(t, body), "the server is busy: 1 requests are waiting for 1 workers")
	cancel()
	wg.Wait()
	waitFor(t, "the worker to drop the canceled requests", func() bool {
		return gauge(t, s, "apportion_requests_in_flight") == 0 && gauge(t, s, "apportion_queue_depth") == 0
	})
}

func TestServeDeadlineStopsWork(t *testing.T) {
	for _, coalesce := range []bool{false, true} {
		t.Run("coalesce="+strconv.FormatBool(coalesce), func(t *testing.T) {
			s, ts, _ := testServer(t, func(o *Options) { o.Timeout, o.Coalesce = 50*time.Millisecond, coalesce })
			start := time.Now()
			code, _, body := post(t, ts.URL+"/v1/explain", slowExplain(t))
			elapsed := time.Since(start)
			// 504 (RFC 9110 §15.6.5) soon after the limit, not after the work.
			assert.Equal(t, http.StatusGatewayTimeout, code)
			assert.Contains(t, errorOf(t, body), "did not finish within the server's time limit of 50ms")
			assert.Less(t, elapsed, 2*time.Second)

			// The passes stop: at most the pass under way when the limit
			// struck may finish after the answer.
			time.Sleep(20 * time.Millisecond)
			p1 := passes(t, s)
			time.Sleep(300 * time.Millisecond)
			p2 := passes(t, s)
			assert.Equal(t, p1, p2, "passes kept growing after the 504")
			// The whole request needs 4 samples × (65536/64 gradient batches
			// + 3 forward passes).
			assert.Less(t, p2, int64(4*(65536/64+3)))
			assert.Greater(t, p2, int64(0))
			waitFor(t, "the worker to stop", func() bool { return gauge(t, s, "apportion_requests_in_flight") == 0 })
		})
	}
}

// parseMetrics reads /metrics with the Prometheus text parser.
func parseMetrics(t *testing.T, url string) map[string]*dto.MetricFamily {
	t.Helper()
	code, body := get(t, url+"/metrics")
	require.Equal(t, http.StatusOK, code)
	p := expfmt.NewTextParser(model.UTF8Validation)
	mfs, err := p.TextToMetricFamilies(strings.NewReader(body))
	require.NoError(t, err, "the Prometheus text format (exposition format 0.0.4)")
	return mfs
}

func labelled(mf *dto.MetricFamily, labels map[string]string) *dto.Metric {
	if mf == nil {
		return nil
	}
next:
	for _, m := range mf.GetMetric() {
		have := map[string]string{}
		for _, l := range m.GetLabel() {
			have[l.GetName()] = l.GetValue()
		}
		for k, v := range labels {
			if have[k] != v {
				continue next
			}
		}
		return m
	}
	return nil
}

func TestServeMetricsAndLogs(t *testing.T) {
	_, ts, logs := testServer(t, nil)
	sample := strings.TrimSpace(demoSampleJSON(t))
	// Two points of the trapezoid rule (the end points) on the demo sample
	// do not meet a 1e-6 tolerance: a completeness failure.
	for i := 0; i < 3; i++ {
		code, _, body := post(t, ts.URL+"/v1/explain", `{"inputs":[`+sample+`],"steps":2,"tolerance":1e-6}`)
		require.Equal(t, http.StatusOK, code, body)
		var doc explainDoc
		require.NoError(t, json.Unmarshal([]byte(body), &doc))
		require.False(t, doc.Explanations[0].Completeness.OK, "relative gap %v", doc.Explanations[0].Completeness.RelativeGap)
	}
	code, _, _ := post(t, ts.URL+"/v1/explain", `{"inputs":[`+sample+`],"method":"grad"}`)
	require.Equal(t, http.StatusOK, code)
	code, _, _ = post(t, ts.URL+"/v1/explain", `{"inputs":[1]}`)
	require.Equal(t, http.StatusBadRequest, code)

	mfs := parseMetrics(t, ts.URL)
	req := mfs["apportion_http_requests_total"]
	require.NotNil(t, req)
	assert.Equal(t, 4.0, labelled(req, map[string]string{"route": "/v1/explain", "code": "200"}).GetCounter().GetValue())
	assert.Equal(t, 1.0, labelled(req, map[string]string{"route": "/v1/explain", "code": "400"}).GetCounter().GetValue())
	lat := labelled(mfs["apportion_explain_duration_seconds"], map[string]string{"method": "integrated-gradients"})
	require.NotNil(t, lat)
	assert.EqualValues(t, 3, lat.GetHistogram().GetSampleCount())
	lat = labelled(mfs["apportion_explain_duration_seconds"], map[string]string{"method": "gradient"})
	require.NotNil(t, lat)
	assert.EqualValues(t, 1, lat.GetHistogram().GetSampleCount())
	inc := labelled(mfs["apportion_completeness_failures_total"], map[string]string{"method": "integrated-gradients"})
	require.NotNil(t, inc)
	assert.Equal(t, 3.0, inc.GetCounter().GetValue())
	require.NotNil(t, mfs["apportion_queue_depth"])
	assert.Equal(t, 0.0, mfs["apportion_queue_depth"].GetMetric()[0].GetGauge().GetValue())
	// Each IG request: f(x), f(x′) and the baseline outputs of the
	// document are forward passes of one sample; one gradient batch of 2.
	grad := labelled(mfs["apportion_model_points_total"], map[string]string{"kind": "gradient"})
	assert.Equal(t, 3*2.0+1, grad.GetCounter().GetValue())

	// One JSON line per request (log/slog's JSON handler).
	var lines []map[string]any
	for _, l := range strings.Split(strings.TrimSpace(logs.String()), "\n") {
		var m map[string]any
		require.NoError(t, json.Unmarshal([]byte(l), &m), l)
		if m["msg"] == "request" {
			lines = append(lines, m)
		}
	}
	require.Len(t, lines, 6) // five requests and the /metrics read
	first := lines[0]
	assert.Equal(t, "/v1/explain", first["route"])
	assert.Equal(t, "200", first["status"])
	assert.Equal(t, "integrated-gradients", first["method"])
	assert.EqualValues(t, 2, first["points"])
	assert.Equal(t, "failed", first["completeness"])
	assert.Contains(t, first, "duration_ms")
	assert.Equal(t, "400", lines[4]["status"])
	assert.Contains(t, lines[4]["error"], "expected samples of shape [8]")
}

func TestServeShutdownDrains(t *testing.T) {
	m, ref := demoModel(t)
	s, err := New(m, Options{Queue: DefaultQueue, Reference: ref})
	require.NoError(t, err)
	defer s.Close()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	url := "http://" + ln.Addr().String()
	ctx, stop := context.WithCancel(context.Background())
	served := make(chan error, 1)
	go func() { served <- Serve(ctx, ln, s, 30*time.Second, nil) }()

	sample := strings.TrimSpace(demoSampleJSON(t))
	answered := make(chan int, 1)
	go func() {
		resp, err := http.Post(url+"/v1/explain", "application/json", strings.NewReader(`{"inputs":[`+sample+`],"steps":65536}`))
		if err != nil {
			answered <- -1
			return
		}
		resp.Body.Close()
		answered <- resp.StatusCode
	}()
	waitFor(t, "the request to be computed", func() bool { return gauge(t, s, "apportion_requests_in_flight") == 1 })
	stop() // as SIGTERM does
	select {
	case err := <-served:
		t.Fatalf("Serve returned %v with a request in flight", err)
	case <-time.After(20 * time.Millisecond):
	}
	assert.Equal(t, http.StatusOK, <-answered, "the request in flight is finished, not cut")
	require.NoError(t, <-served)
	_, err = http.Get(url + "/healthz")
	assert.Error(t, err, "no new connections after shutdown")
}

func TestServeCoalescedMatchesAlone(t *testing.T) {
	// Samples do not interact in a batch (nn.Head.Gradient), so a request
	// stacked with others gets the document it gets alone. The reference
	// is the uncoalesced server; the documents of 16 concurrent requests
	// on 16 different samples must match it value for value.
	_, alone, _ := testServer(t, nil)
	_, stacked, _ := testServer(t, func(o *Options) { o.Coalesce = true })
	var x []float64
	require.NoError(t, json.Unmarshal([]byte(demoSampleJSON(t)), &x))
	bodies := make([]string, 16)
	for i := range bodies {
		xi := append([]float64(nil), x...)
		xi[i%8] *= 1 + 0.05*float64(i)
		bodies[i] = fmt.Sprintf(`{"inputs":[%s],"steps":16,"target":%d}`, floatsJSON(xi), i%3)
	}
	want := make([]string, len(bodies))
	for i, b := range bodies {
		code, _, body := post(t, alone.URL+"/v1/explain", b)
		require.Equal(t, http.StatusOK, code, body)
		want[i] = body
	}
	got := make([]string, len(bodies))
	var wg sync.WaitGroup
	for i, b := range bodies {
		wg.Add(1)
		go func() {
			defer wg.Done()
			resp, err := http.Post(stacked.URL+"/v1/explain", "application/json", strings.NewReader(b))
			if err != nil {
				return
			}
			defer resp.Body.Close()
			raw, _ := io.ReadAll(resp.Body)
			got[i] = string(raw)
		}()
	}
	wg.Wait()
	for i := range bodies {
		assert.JSONEq(t, want[i], got[i], "request %d", i)
	}
}

func TestServeExact(t *testing.T) {
	// The pumps demo is piecewise-linear up to its Softmax: "steps":
	// "exact" (and the default, auto) integrate exactly, with or without
	// coalescing, to the same document; completeness (Sundararajan et al.
	// 2017, Proposition 1) holds to float32 rounding.
	_, alone, _ := testServer(t, nil)
	_, stacked, _ := testServer(t, func(o *Options) { o.Coalesce = true })
	sample := strings.TrimSpace(demoSampleJSON(t))
	for _, steps := range []string{`"exact"`, `"auto"`} {
		body := `{"inputs":[` + sample + `],"steps":` + steps + `}`
		var docs []string
		for _, ts := range []*httptest.Server{alone, stacked} {
			code, _, got := post(t, ts.URL+"/v1/explain", body)
			require.Equal(t, http.StatusOK, code, got)
			docs = append(docs, got)
		}
		assert.JSONEq(t, docs[0], docs[1], "coalescing leaves the exact integral alone")
		var doc struct {
			Explanations []struct {
				Exact        bool `json:"exact"`
				Pieces       int  `json:"pieces"`
				Points       int  `json:"points"`
				Completeness struct {
					RelativeGap float64 `json:"relative_gap"`
				} `json:"completeness"`
			} `json:"explanations"`
		}
		require.NoError(t, json.Unmarshal([]byte(docs[0]), &doc))
		e := doc.Explanations[0]
		assert.True(t, e.Exact, steps)
		assert.Positive(t, e.Pieces, steps)
		assert.Zero(t, e.Points, steps)
		assert.Less(t, e.Completeness.RelativeGap, 1e-5, steps)
	}
	code, _, body := post(t, alone.URL+"/v1/explain", `{"inputs":[`+sample+`],"steps":"exactly"}`)
	assert.Equal(t, http.StatusBadRequest, code)
	assert.Contains(t, errorOf(t, body), `"steps" must be auto, exact, refine or a number`)
}

// gatedModel passes calls to m, holding the first one until open is closed,
// and records the batch size of every call.
type gatedModel struct {
	m     gradattr.Model
	open  chan struct{}
	once  sync.Once
	first chan struct{} // closed when the first call has arrived
	mu    sync.Mutex
	sizes []int
}

func (g *gatedModel) InputShape() []int { return g.m.InputShape() }
func (g *gatedModel) OutputSize() int   { return g.m.OutputSize() }

func (g *gatedModel) hold(n int) {
	g.mu.Lock()
	g.sizes = append(g.sizes, n)
	g.mu.Unlock()
	g.once.Do(func() {
		close(g.first)
		<-g.open
	})
}

func (g *gatedModel) Forward(ctx context.Context, x []float64, n int) ([]float64, error) {
	g.hold(n)
	return g.m.Forward(ctx, x, n)
}

func (g *gatedModel) Gradient(ctx context.Context, x []float64, n int, target []int) ([]float64, []float64, error) {
	g.hold(n)
	return g.m.Gradient(ctx, x, n, target)
}

func TestBatcherStacksCalls(t *testing.T) {
	// Closed form: F_k(x) = (k+1) Σ_i x_i², so ∂F_k/∂x_i = 2 (k+1) x_i.
	f := &gradattr.Func{
		Shape: []int{3}, Outputs: 2,
		F: func(out, x []float64) {
			s := 0.0
			for _, v := range x {
				s += v * v
			}
			out[0], out[1] = s, 2*s
		},
		Grad: func(grad, x []float64, k int) {
			for i, v := range x {
				grad[i] = 2 * float64(k+1) * v
			}
		},
	}
	g := &gatedModel{m: f, open: make(chan struct{}), first: make(chan struct{})}
	m := newMetrics()
	b := newBatcher(g, 1, 64, 0, func() int { return 0 }, m)
	defer b.Close()

	// The first call occupies the runner; the next five wait and are
	// stacked into one pass of 3+1+1+1+1 = 7 points, padded to 8.
	point := func(i int) []float64 { return []float64{float64(i), -0.5 * float64(i), 1} }
	type result struct {
		out, grad []float64
		err       error
	}
	results := make([]result, 6)
	var wg sync.WaitGroup
	call := func(i int, x []float64, n int, target []int) {
		defer wg.Done()
		out, grad, err := b.Gradient(context.Background(), x, n, target)
		results[i] = result{out, grad, err}
	}
	wg.Add(1)
	go call(0, point(0), 1, []int{0})
	<-g.first
	canceled, cancel := context.WithCancel(context.Background())
	wg.Add(1)
	go func() {
		defer wg.Done()
		_, _, err := b.Gradient(canceled, point(9), 1, []int{0})
		results[5].err = err
	}()
	x3 := append(append(point(1), point(2)...), point(3)...)
	wg.Add(4)
	go call(1, x3, 3, []int{1, 0, 1})
	go call(2, point(4), 1, []int{1})
	go call(3, point(5), 1, []int{0})
	go call(4, point(6), 1, []int{1})
	waitFor(t, "the calls to queue", func() bool { return len(b.urgent) == 5 })
	cancel() // given up while waiting: no pass may include it
	time.Sleep(10 * time.Millisecond)
	close(g.open)
	wg.Wait()

	assert.ErrorIs(t, results[5].err, context.Canceled)
	g.mu.Lock()
	assert.Equal(t, []int{1, 8}, g.sizes, "one pass alone, then the four live calls stacked and padded")
	g.mu.Unlock()
	check := func(r result, xs [][]float64, targets []int) {
		require.NoError(t, r.err)
		require.Len(t, r.out, 2*len(xs))
		require.Len(t, r.grad, 3*len(xs))
		for j, x := range xs {
			s := x[0]*x[0] + x[1]*x[1] + x[2]*x[2]
			assert.Equal(t, []float64{s, 2 * s}, r.out[2*j:2*j+2])
			for i := range x {
				assert.Equal(t, 2*float64(targets[j]+1)*x[i], r.grad[3*j+i])
			}
		}
	}
	check(results[0], [][]float64{point(0)}, []int{0})
	check(results[1], [][]float64{point(1), point(2), point(3)}, []int{1, 0, 1})
	check(results[2], [][]float64{point(4)}, []int{1})
	check(results[3], [][]float64{point(5)}, []int{0})
	check(results[4], [][]float64{point(6)}, []int{1})
}

func TestNamedInputs(t *testing.T) {
	// Samples as objects keyed by feature name, the request's form of a CSV
	// file with a header: rows of the demo's held-out file, keyed by its
	// header (the model's feature_names metadata) in reverse order. The
	// values are bound by name, so the documents equal those of the same
	// rows as arrays in the feature order demo/data/README.md documents.
	_, ts, _ := testServer(t, nil)
	order := []string{"bearing_temp", "vibration_rms", "discharge_pressure", "suction_pressure", "flow", "motor_current", "hours_since_service", "ambient_temp"}
	raw, err := demo.File("pumps_test.csv")
	require.NoError(t, err)
	lines := strings.Split(string(raw), "\n")
	header := strings.Split(lines[0], ",")
	var objects, arrays []string
	for _, line := range lines[1:4] {
		cells := strings.Split(line, ",")
		byName := map[string]string{}
		for j, h := range header {
			byName[h] = cells[j]
		}
		var kv, vals []string
		for j := len(order) - 1; j >= 0; j-- {
			kv = append(kv, strconv.Quote(order[j])+":"+byName[order[j]])
		}
		for _, f := range order {
			vals = append(vals, byName[f])
		}
		objects = append(objects, "{"+strings.Join(kv, ",")+"}")
		arrays = append(arrays, "["+strings.Join(vals, ",")+"]")
	}
	for route, rest := range map[string]string{"/v1/predict": "}", "/v1/explain": `,"method":"grad"}`} {
		code, _, byName := post(t, ts.URL+route, `{"inputs":[`+strings.Join(objects, ",")+`]`+rest)
		require.Equal(t, http.StatusOK, code, byName)
		code, _, byPosition := post(t, ts.URL+route, `{"inputs":[`+strings.Join(arrays, ",")+`]`+rest)
		require.Equal(t, http.StatusOK, code, byPosition)
		assert.JSONEq(t, byPosition, byName, route)
	}
	// One object alone is one sample.
	code, _, one := post(t, ts.URL+"/v1/predict", `{"inputs":`+objects[0]+`}`)
	require.Equal(t, http.StatusOK, code, one)
	code, _, first := post(t, ts.URL+"/v1/predict", `{"inputs":[`+arrays[0]+`]}`)
	require.Equal(t, http.StatusOK, code)
	assert.JSONEq(t, first, one)

	// A feature left out, a key that is not a feature, a value that is not
	// a number and one the input cannot take are named, with the sample:
	// beside a good sample, in the answer's "errors" (the good one
	// answered); alone, as a bad request.
	for body, want := range map[string]string{
		`{"inputs":[` + objects[0] + `,{"flow":1}]}`:                                                                            `"inputs"[1] (for "sensors"): feature "bearing_temp" is missing`,
		`{"inputs":[` + objects[0] + "," + strings.Replace(objects[1], `"ambient_temp":`, `"ambient":`, 1) + `]}`:               `"inputs"[1] (for "sensors"): "ambient" is not a feature of the model (features: bearing_temp, vibration_rms,`,
		`{"inputs":[` + strings.Replace(objects[0], `"flow":`, `"x":1,"flow":`, 1) + `]}`:                                       `"inputs"[0] (for "sensors"): "x" is not a feature`,
		`{"inputs":[` + regexp.MustCompile(`"bearing_temp":[^,}]+`).ReplaceAllString(objects[0], `"bearing_temp":"hot"`) + `]}`: `"inputs"[0] (for "sensors"): feature "bearing_temp": expected a number, got "hot"`,
		// 1e300 is a float64 but beyond the float32 input's range (IEEE 754
		// binary32: largest finite ≈ 3.4e38), as in an array of numbers.
		`{"inputs":[` + regexp.MustCompile(`"flow":[^,}]+`).ReplaceAllString(objects[0], `"flow":1e300`) + `]}`: `"inputs"[0] (for "sensors"): feature "flow": 1e+300 is out of the float32 range of the input`,
	} {
		code, _, got := post(t, ts.URL+"/v1/predict", body)
		if strings.HasPrefix(want, `"inputs"[1]`) {
			require.Equal(t, http.StatusOK, code, got)
			var res struct {
				Rows   []int
				Errors []explain.RowError
			}
			require.NoError(t, json.Unmarshal([]byte(got), &res))
			assert.Equal(t, []int{0}, res.Rows)
			require.Len(t, res.Errors, 1, got)
			assert.Contains(t, res.Errors[0].Error, want)
			continue
		}
		assert.Equal(t, http.StatusBadRequest, code, got)
		assert.Contains(t, errorOf(t, got), want)
	}
}
