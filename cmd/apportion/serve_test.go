package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
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

// testServer starts a server on an httptest listener (127.0.0.1). edit
// changes the configuration before it is validated.
func testServer(t *testing.T, edit func(c *serveConfig)) (*server, *httptest.Server, *syncBuffer) {
	t.Helper()
	c := serveConfig{maxBody: defaultMaxBody, timeout: defaultTimeout, queue: defaultQueue, drain: defaultDrain}
	if edit != nil {
		edit(&c)
	}
	require.Empty(t, c.validate())
	logs := &syncBuffer{}
	s, err := newServer(c, slog.New(slog.NewJSONHandler(logs, nil)))
	require.NoError(t, err)
	ts := httptest.NewServer(s.Handler())
	t.Cleanup(func() {
		ts.Close()
		s.Close()
	})
	return s, ts, logs
}

func post(t *testing.T, url, body string) (int, http.Header, string) {
	t.Helper()
	resp, err := http.Post(url, "application/json", strings.NewReader(body))
	require.NoError(t, err)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	require.NoError(t, err)
	return resp.StatusCode, resp.Header, string(b)
}

func get(t *testing.T, url string) (int, string) {
	t.Helper()
	resp, err := http.Get(url)
	require.NoError(t, err)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	require.NoError(t, err)
	return resp.StatusCode, string(b)
}

// errorOf decodes an error body; every error is {"error": "..."}.
func errorOf(t *testing.T, body string) string {
	t.Helper()
	var e map[string]string
	require.NoError(t, json.Unmarshal([]byte(body), &e), body)
	require.Len(t, e, 1, body)
	return e["error"]
}

// demoSampleJSON is the demo's own sample, as the CLI explains it by default.
func demoSampleJSON(t *testing.T) string {
	t.Helper()
	l, err := loadModel("", "")
	require.NoError(t, err)
	var v []float64
	require.NoError(t, json.Unmarshal(l.demo.sample, &v))
	return string(l.demo.sample)
}

func TestServeExplainIsTheCLIDocument(t *testing.T) {
	_, ts, _ := testServer(t, nil)
	sample := strings.TrimSpace(demoSampleJSON(t))
	cases := []struct {
		body string
		args []string
	}{
		{`{"inputs":[` + sample + `],"steps":16}`, []string{"-steps", "16"}},
		{`{"inputs":[` + sample + `],"method":"grad","target":1}`, []string{"-method", "grad", "-target", "1"}},
		{`{"inputs":[` + sample + `],"method":"grad-input","logits":true}`, []string{"-method", "grad-input", "-logits"}},
		{`{"inputs":[` + sample + `],"method":"smoothgrad","samples":8,"noise":0.1,"seed":7}`, []string{"-method", "smoothgrad", "-samples", "8", "-noise", "0.1", "-seed", "7"}},
		{`{"inputs":[` + sample + `],"steps":8,"rule":"gauss-legendre","tolerance":0.01}`, []string{"-steps", "8", "-rule", "gauss-legendre", "-tolerance", "0.01"}},
		{`{"inputs":[` + sample + `],"method":"expected-grad","samples":16}`, []string{"-method", "expected-grad", "-samples", "16"}},
	}
	for _, tc := range cases {
		t.Run(strings.Join(tc.args, " "), func(t *testing.T) {
			code, _, body := post(t, ts.URL+"/v1/explain", tc.body)
			require.Equal(t, http.StatusOK, code, body)
			cliCode, out, errs := cli(t, append([]string{"explain", "-format", "json"}, tc.args...)...)
			require.Contains(t, []int{exitOK, exitFail}, cliCode, errs)
			// The same document, field for field. The CLI leaves the
			// embedded demo's reference set unnamed; the server names it.
			var want, got map[string]any
			require.NoError(t, json.Unmarshal([]byte(out), &want), out)
			require.NoError(t, json.Unmarshal([]byte(body), &got), body)
			if st := want["settings"].(map[string]any); st["reference"] == "" {
				st["reference"] = "demo:pumps_reference.csv"
			}
			assert.Equal(t, want, got)

			var doc explainDoc
			require.NoError(t, json.Unmarshal([]byte(body), &doc))
			require.Len(t, doc.Explanations, 1)
			e := doc.Explanations[0]
			require.Nil(t, e.Error)
			if cp := e.Completeness; cp != nil && doc.Method == "integrated-gradients" {
				// Completeness (Sundararajan et al. 2017, Proposition 1) is
				// judged against F(x) − F(x′) read off the document's own
				// outputs at the sample and at the baseline.
				want := e.Outputs[*e.Target] - e.BaselineOutputs[*e.Target]
				assert.InDelta(t, want, cp.Expected, 1e-12)
				assert.InDelta(t, sum(e.Attributions), cp.Sum, 1e-9)
				gap := math.Abs(cp.Sum-cp.Expected) / math.Max(math.Abs(cp.Expected), 1e-6)
				assert.InDelta(t, gap, cp.RelativeGap, 1e-9)
				assert.Equal(t, gap <= cp.Tolerance, cp.OK)
			}
		})
	}
}

// softmaxServer serves node/test_softmax_example of the ONNX backend test
// data: y = Softmax(x), x of shape [1,3].
func softmaxServer(t *testing.T, edit func(c *serveConfig)) (*server, *httptest.Server, []float64, []float64, string) {
	t.Helper()
	model, x, y, _ := softmaxCase(t)
	s, ts, _ := testServer(t, func(c *serveConfig) {
		c.modelPath = model
		if edit != nil {
			edit(c)
		}
	})
	return s, ts, x, y, model
}

func floatsJSON(v []float64) string {
	b, _ := json.Marshal(v)
	return string(b)
}

func TestServeBackendSoftmax(t *testing.T) {
	_, ts, x, y, model := softmaxServer(t, nil)

	// /v1/model is the document of inspect -format json.
	code, body := get(t, ts.URL+"/v1/model")
	require.Equal(t, http.StatusOK, code)
	_, out, _ := cli(t, "inspect", "-format", "json", "-model", model)
	assert.Equal(t, out, body)

	predict := func(x []float64) []float64 {
		code, _, body := post(t, ts.URL+"/v1/predict", `{"inputs":[`+floatsJSON(x)+`]}`)
		require.Equal(t, http.StatusOK, code, body)
		var doc struct {
			Outputs []struct {
				Name  string    `json:"name"`
				Shape []int     `json:"shape"`
				Data  []float64 `json:"data"`
			} `json:"outputs"`
		}
		require.NoError(t, json.Unmarshal([]byte(body), &doc))
		require.Len(t, doc.Outputs, 1)
		assert.Equal(t, "y", doc.Outputs[0].Name) // graph output (python3-onnx 1.12.0)
		return doc.Outputs[0].Data
	}
	assertClose(t, y, predict(x), "outputs vs output_0.pb (ONNX backend test data 1.12.0)")

	// The gradient of y_k against central finite differences of /v1/predict,
	// (y_k(x + h e_i) − y_k(x − h e_i)) / 2h, h = 1e-2 (float32 engine).
	for k := 0; k < 3; k++ {
		code, _, body := post(t, ts.URL+"/v1/explain", fmt.Sprintf(`{"inputs":[%s],"method":"grad","target":%d}`, floatsJSON(x), k))
		require.Equal(t, http.StatusOK, code, body)
		var doc explainDoc
		require.NoError(t, json.Unmarshal([]byte(body), &doc))
		g := doc.Explanations[0].Attributions
		require.Len(t, g, 3)
		const h = 1e-2
		for i := range x {
			xp := append([]float64(nil), x...)
			xm := append([]float64(nil), x...)
			xp[i] += h
			xm[i] -= h
			fd := (predict(xp)[k] - predict(xm)[k]) / (2 * h)
			assert.InDelta(t, fd, g[i], 2e-3, "∂y_%d/∂x_%d: central difference", k, i)
			// Closed form of the softmax Jacobian: ∂y_k/∂x_i = y_k(δ_ik − y_i).
			d := 0.0
			if i == k {
				d = 1
			}
			assert.InDelta(t, y[k]*(d-y[i]), g[i], 1e-5, "∂y_%d/∂x_%d: closed form", k, i)
		}
	}
}

func TestServeStatuses(t *testing.T) {
	_, ts, _ := testServer(t, func(c *serveConfig) { c.maxBody = 1 << 10 })
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
			[]string{"expected samples of shape [8] (8 values each)", "got an array of shape [1 3] (3 values per row)"}},
		{"wrong length predict", "/v1/predict", `{"inputs": [[1, 2, 3, 4, 5, 6, 7, 8, 9]]}`, http.StatusBadRequest,
			[]string{"expected samples of shape [8]", "9 values per row"}},
		{"NaN token", "/v1/explain", `{"inputs": [[1, 2, 3, NaN, 5, 6, 7, 8]]}`, http.StatusBadRequest, []string{"NaN", "expected finite numbers"}},
		{"Infinity token", "/v1/predict", `{"inputs": [[1, 2, 3, -Infinity, 5, 6, 7, 8]]}`, http.StatusBadRequest, []string{"Infinity", "expected finite numbers"}},
		// 1e999 overflows float64 (IEEE 754 binary64: largest finite ≈ 1.8e308).
		{"overflow", "/v1/explain", `{"inputs": [[1, 2, 3, 1e999, 5, 6, 7, 8]]}`, http.StatusBadRequest, []string{"1e999 is out of the float64 range"}},
		{"unknown method", "/v1/explain", `{"inputs": [` + sample + `], "method": "lime"}`, http.StatusBadRequest,
			[]string{`"method" must be one of gradient (grad), gradient-times-input (grad-input), smoothgrad, integrated-gradients (ig), expected-gradients (expected-grad), got "lime"`}},
		{"no inputs", "/v1/explain", `{"method": "grad"}`, http.StatusBadRequest, []string{`"inputs" is required`}},
		{"target out of range", "/v1/explain", `{"inputs": [` + sample + `], "method": "grad", "target": 3}`, http.StatusBadRequest, []string{"target 3", "0..2"}},
		{"file baseline", "/v1/explain", `{"inputs": [` + sample + `], "baseline": "/etc/passwd"}`, http.StatusBadRequest, []string{`"baseline" must be zero, mean, blur or blur:S`}},
		{"steps too large", "/v1/explain", `{"inputs": [` + sample + `], "steps": 100000}`, http.StatusBadRequest, []string{`"steps" must be auto or a number from 1 to 65536, got "100000"`}},
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
	_, ts, _ := testServer(t, func(c *serveConfig) { c.maxBody = 4 << 10 })
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
func gauge(t *testing.T, s *server, name string) float64 {
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
	s, ts, _ := testServer(t, func(c *serveConfig) { c.workers, c.queue = 1, 1 })
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
	assert.Equal(t, strconv.Itoa(defaultRetryAfter), hdr.Get("Retry-After"))
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
			s, ts, _ := testServer(t, func(c *serveConfig) { c.timeout, c.coalesce = 50*time.Millisecond, coalesce })
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
			p1 := s.Passes()
			time.Sleep(300 * time.Millisecond)
			p2 := s.Passes()
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
	// Two points of the trapezoid rule (the end points) on the saturated
	// demo sample cannot meet a 1e-6 tolerance: a completeness failure.
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
	c := serveConfig{maxBody: defaultMaxBody, timeout: defaultTimeout, queue: defaultQueue, drain: 30 * time.Second}
	require.Empty(t, c.validate())
	s, err := newServer(c, slog.New(slog.NewJSONHandler(io.Discard, nil)))
	require.NoError(t, err)
	defer s.Close()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	url := "http://" + ln.Addr().String()
	ctx, stop := context.WithCancel(context.Background())
	served := make(chan error, 1)
	go func() { served <- s.Serve(ctx, ln) }()

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

func TestServeSignal(t *testing.T) {
	pr, pw := io.Pipe()
	done := make(chan int, 1)
	go func() {
		code := run([]string{"serve", "-addr", "127.0.0.1:0", "-drain", "5s"}, strings.NewReader(""), io.Discard, pw)
		pw.Close()
		done <- code
	}()
	sc := bufio.NewScanner(pr)
	require.True(t, sc.Scan(), "no log line")
	var first map[string]any
	require.NoError(t, json.Unmarshal(sc.Bytes(), &first))
	require.Equal(t, "listening", first["msg"])
	addr := first["addr"].(string)
	go io.Copy(io.Discard, pr)
	code, _ := get(t, "http://"+addr+"/healthz")
	require.Equal(t, http.StatusOK, code)
	// signal.NotifyContext is in place before the "listening" line, so the
	// signal stops the server, not the test binary.
	require.NoError(t, syscall.Kill(os.Getpid(), syscall.SIGTERM))
	select {
	case code := <-done:
		assert.Equal(t, exitOK, code)
	case <-time.After(10 * time.Second):
		t.Fatal("serve did not stop on SIGTERM")
	}
}

func TestServeFlags(t *testing.T) {
	for _, tc := range []struct {
		args []string
		says string
	}{
		{[]string{"-max-body", "lots"}, `expected a number of bytes such as 8MiB, 512KiB or 1000000, got "lots"`},
		{[]string{"-max-body", "0"}, "-max-body must be at least 1 byte, got 0"},
		{[]string{"-timeout", "0s"}, "-timeout must be positive"},
		{[]string{"-workers", "-1"}, "-workers must be 0 (default) or more, got -1"},
		{[]string{"-queue", "-2"}, "-queue must be 0 or more, got -2"},
	} {
		code, _, errs := cli(t, append([]string{"serve"}, tc.args...)...)
		assert.Equal(t, exitUsage, code, tc.args)
		assert.Contains(t, errs, tc.says)
	}
	code, _, errs := cli(t, "serve", "-model", filepath.Join(t.TempDir(), "missing.onnx"))
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errs, "missing.onnx")

	// IEC 80000-13 binary prefixes and SI prefixes.
	for in, want := range map[string]int64{"8MiB": 8 << 20, "512KiB": 512 << 10, "1GiB": 1 << 30, "2MB": 2_000_000, "1kB": 1000, "77": 77, "1.5KiB": 1536} {
		got, err := parseBytes(in)
		require.NoError(t, err, in)
		assert.Equal(t, want, got, in)
	}
	assert.Equal(t, "8MiB", formatBytes(8<<20))
	assert.Equal(t, "1000", formatBytes(1000))
}

func TestServeCoalescedMatchesAlone(t *testing.T) {
	// Samples do not interact in a batch (nn.Head.Gradient), so a request
	// stacked with others gets the document it gets alone. The reference
	// is the uncoalesced server; the documents of 16 concurrent requests
	// on 16 different samples must match it value for value.
	_, alone, _ := testServer(t, nil)
	_, stacked, _ := testServer(t, func(c *serveConfig) { c.coalesce = true })
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
	m := newServeMetrics()
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
	waitFor(t, "the calls to queue", func() bool { return len(b.calls) == 5 })
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
