package httpapi

import (
	"bufio"
	"encoding/json"
	"fmt"
	"io"
	"net"
	"net/http"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/apportion/apportion/explain"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestServeShortSecondSample(t *testing.T) {
	// A second sample of 3 values among samples of 8 (the pumps demo's
	// eight sensors): the first is answered, the second is reported by its
	// length, as the command line does, not by the NaN that marks it
	// unread. A request of that sample alone is a bad request.
	_, ts, _ := testServer(t, nil)
	sample := demoSampleJSON(t)
	want := "expected 8 values (shape [8]), got 3 (shape [3])"

	code, _, body := post(t, ts.URL+"/v1/explain", `{"inputs": [`+sample+`, [1, 2, 3]], "steps": 8}`)
	require.Equal(t, http.StatusOK, code, body)
	var doc struct {
		Explanations []struct {
			Attributions []float64 `json:"attributions"`
			Error        *string   `json:"error"`
		} `json:"explanations"`
	}
	require.NoError(t, json.Unmarshal([]byte(body), &doc), body)
	require.Len(t, doc.Explanations, 2)
	assert.Nil(t, doc.Explanations[0].Error)
	assert.Len(t, doc.Explanations[0].Attributions, 8)
	require.NotNil(t, doc.Explanations[1].Error)
	assert.Contains(t, *doc.Explanations[1].Error, want)
	assert.NotContains(t, *doc.Explanations[1].Error, "NaN")

	code, _, body = post(t, ts.URL+"/v1/predict", `{"inputs": [`+sample+`, [1, 2, 3]]}`)
	require.Equal(t, http.StatusOK, code, body)
	var pred struct {
		Outputs []struct{ Shape []int }
		Rows    []int
		Errors  []explain.RowError
	}
	require.NoError(t, json.Unmarshal([]byte(body), &pred), body)
	assert.Equal(t, []int{1, 3}, pred.Outputs[0].Shape)
	assert.Equal(t, []int{0}, pred.Rows)
	require.Len(t, pred.Errors, 1)
	assert.Equal(t, 1, pred.Errors[0].Index)
	assert.Contains(t, pred.Errors[0].Error, want)

	for route, extra := range map[string]string{"/v1/explain": `, "steps": 8`, "/v1/predict": ""} {
		code, _, body := post(t, ts.URL+route, `{"inputs": [[1, 2, 3]]`+extra+`}`)
		assert.Equal(t, http.StatusBadRequest, code, route)
		assert.Equal(t, `"inputs" (for "sensors"): sample 0: `+want, errorOf(t, body), route)
	}
}

func TestServeMaxSamples(t *testing.T) {
	// 257 samples in a request, one past the default of 256: 413 with the
	// limit, whatever the route; 256 are served.
	s, ts, _ := testServer(t, nil)
	sample := demoSampleJSON(t)
	many := func(n int) string { return "[" + strings.TrimSuffix(strings.Repeat(sample+",", n), ",") + "]" }
	code, _, body := post(t, ts.URL+"/v1/predict", `{"inputs": `+many(DefaultMaxSamples+1)+`}`)
	assert.Equal(t, http.StatusRequestEntityTooLarge, code)
	assert.Equal(t, `"inputs" holds more than the 256 samples one request may have; send them in several requests`, errorOf(t, body))
	code, _, body = post(t, ts.URL+"/v1/explain", `{"inputs": `+many(DefaultMaxSamples+1)+`, "method": "grad"}`)
	assert.Equal(t, http.StatusRequestEntityTooLarge, code, body)
	assert.Zero(t, passes(t, s), "no model pass for a refused request")
	code, _, body = post(t, ts.URL+"/v1/predict", `{"inputs": `+many(DefaultMaxSamples)+`}`)
	require.Equal(t, http.StatusOK, code, body)

	// The limit is an option of the handler.
	_, ts, _ = testServer(t, func(o *Options) { o.MaxSamples = 2 })
	code, _, body = post(t, ts.URL+"/v1/predict", `{"inputs": `+many(3)+`}`)
	assert.Equal(t, http.StatusRequestEntityTooLarge, code)
	assert.Contains(t, errorOf(t, body), "more than the 2 samples")
}

// logLine returns the request log line whose request_id is id.
func logLine(t *testing.T, logs *syncBuffer, id string) map[string]any {
	t.Helper()
	for _, line := range strings.Split(strings.TrimSpace(logs.String()), "\n") {
		var rec map[string]any
		require.NoError(t, json.Unmarshal([]byte(line), &rec), line)
		if rec["request_id"] == id {
			return rec
		}
	}
	t.Fatalf("no log line with request_id %q in %s", id, logs.String())
	return nil
}

func TestServeRequestID(t *testing.T) {
	_, ts, logs := testServer(t, nil)
	send := func(id, body string) (*http.Response, string) {
		req, err := http.NewRequest(http.MethodPost, ts.URL+"/v1/explain", strings.NewReader(body))
		require.NoError(t, err)
		if id != "" {
			req.Header.Set("X-Request-ID", id)
		}
		resp, err := http.DefaultClient.Do(req)
		require.NoError(t, err)
		defer resp.Body.Close()
		raw, err := io.ReadAll(resp.Body)
		require.NoError(t, err)
		return resp, string(raw)
	}
	// The client's ID is echoed in the header, the error body and the log.
	resp, body := send("pump-7/2024-05-01T10:00", `{"inputs": [[1, 2, 3]]}`)
	assert.Equal(t, http.StatusBadRequest, resp.StatusCode)
	assert.Equal(t, "pump-7/2024-05-01T10:00", resp.Header.Get("X-Request-ID"))
	var e map[string]string
	require.NoError(t, json.Unmarshal([]byte(body), &e))
	assert.Equal(t, "pump-7/2024-05-01T10:00", e["request_id"])
	rec := logLine(t, logs, "pump-7/2024-05-01T10:00")
	assert.Equal(t, "400", rec["status"])
	assert.Contains(t, rec["error"], "expected 8 values")

	// Without one, or with one that cannot be echoed (spaces, over 128
	// characters), the server makes one: 16 random bytes in hex.
	for _, given := range []string{"", "two words", strings.Repeat("x", 129)} {
		resp, _ := send(given, `{"inputs": [`+demoSampleJSON(t)+`], "method": "grad"}`)
		assert.Equal(t, http.StatusOK, resp.StatusCode)
		id := resp.Header.Get("X-Request-ID")
		assert.Regexp(t, `^[0-9a-f]{32}$`, id, "given %q", given)
		assert.Equal(t, "200", logLine(t, logs, id)["status"])
	}
}

func TestServeWorkBudget(t *testing.T) {
	// Two samples with integrated gradients at 47 trapezoid points cost,
	// each, f(x), f(x′), 47 gradients and the output at the baseline: 50
	// model evaluations, 100 in all, which the model's own count of the
	// samples it is sent confirms; at 48 points, 102, over a budget of 100:
	// 413 before any pass.
	s, ts, logs := testServer(t, func(o *Options) { o.MaxWork = 100 })
	sample := demoSampleJSON(t)
	req := func(steps string) string {
		return `{"inputs": [` + sample + `, ` + sample + `], "rule": "trapezoid", "steps": ` + steps + `}`
	}
	code, _, body := post(t, ts.URL+"/v1/explain", req("48"))
	assert.Equal(t, http.StatusRequestEntityTooLarge, code)
	assert.Equal(t, "the request costs up to 102 model evaluations (2 samples, 51 each), over this server's budget of 100 per request; send fewer samples, or ask for fewer steps or samples per explanation", errorOf(t, body))
	assert.Zero(t, passes(t, s))

	code, hdr, body := post(t, ts.URL+"/v1/explain", req("47"))
	require.Equal(t, http.StatusOK, code, body)
	assert.EqualValues(t, 100, counterSum(t, s, "apportion_model_points_total"))
	assert.EqualValues(t, 100, logLine(t, logs, hdr.Get("X-Request-ID"))["work"])

	// The request of 5,000 samples × 4,097 steps that once ran 17 s: its
	// cost is known from its settings alone, and refused at once (here
	// with the sample limit raised so that the budget decides).
	s, ts, _ = testServer(t, func(o *Options) { o.MaxSamples = 5000 })
	code, _, body = post(t, ts.URL+"/v1/explain", `{"inputs": [`+strings.TrimSuffix(strings.Repeat(sample+",", 5000), ",")+`], "steps": 4097}`)
	assert.Equal(t, http.StatusRequestEntityTooLarge, code)
	assert.Contains(t, errorOf(t, body), "costs up to 20500000 model evaluations (5000 samples, 4100 each), over this server's budget of 4194304")
	assert.Zero(t, passes(t, s))
}

func TestServeSlowBodyMeetsTheDeadline(t *testing.T) {
	// A client that sends its body a byte every 20 ms (a 1,000-byte body
	// would take 20 s) gets 408 once the request's time limit of 300 ms
	// has passed, while it is still sending: the limit covers reading the
	// body, whose reads the handler's deadline ends.
	_, ts, _ := testServer(t, func(o *Options) { o.Timeout = 300 * time.Millisecond })
	conn, err := net.Dial("tcp", ts.Listener.Addr().String())
	require.NoError(t, err)
	defer conn.Close()
	_, err = fmt.Fprintf(conn, "POST /v1/explain HTTP/1.1\r\nHost: test\r\nContent-Type: application/json\r\nContent-Length: 1000\r\n\r\n{")
	require.NoError(t, err)
	var sent atomic.Int64
	stop := make(chan struct{})
	defer close(stop)
	go func() {
		for range 999 {
			select {
			case <-stop:
				return
			case <-time.After(20 * time.Millisecond):
			}
			if _, err := conn.Write([]byte(" ")); err != nil {
				return
			}
			sent.Add(1)
		}
	}()
	resp, err := http.ReadResponse(bufio.NewReader(conn), nil)
	require.NoError(t, err)
	defer resp.Body.Close()
	raw, err := io.ReadAll(resp.Body)
	require.NoError(t, err)
	assert.Equal(t, http.StatusRequestTimeout, resp.StatusCode)
	assert.Equal(t, "the request body did not arrive within the server's time limit of 300ms", errorOf(t, string(raw)))
	assert.Less(t, sent.Load(), int64(999), "answered only after the whole body was sent")
}

func TestServeFieldTypes(t *testing.T) {
	// A field of the wrong JSON type is named with what it takes, in the
	// request's words.
	_, ts, _ := testServer(t, nil)
	sample := demoSampleJSON(t)
	for body, want := range map[string]string{
		`{"inputs": [` + sample + `], "method": 5}`:     `"method" must be a string, got 5`,
		`{"inputs": [` + sample + `], "seed": -1}`:      `"seed" must be a non-negative integer, got -1`,
		`{"inputs": [` + sample + `], "logits": "yes"}`: `"logits" must be true or false, got "yes"`,
		`{"inputs": [` + sample + `], "noise": [0.1]}`:  `"noise" must be a number, got [0.1]`,
		`[1, 2]`:             "malformed JSON: expected an object, got an array",
		`{"inputs": [1]} {}`: "malformed JSON: expected one object, got more data after it",
		` `:                  "malformed JSON: expected an object, got an empty body",
	} {
		code, _, got := post(t, ts.URL+"/v1/explain", body)
		assert.Equal(t, http.StatusBadRequest, code, body)
		assert.Equal(t, want, errorOf(t, got), body)
	}
}
