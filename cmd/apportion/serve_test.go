package main

import (
	"bufio"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/httpapi"
	"github.com/apportion/apportion/internal/testhttp"
)

// testServer starts the serve command's handler on an httptest listener
// (127.0.0.1), with the command's defaults; edit changes the configuration
// before it is validated.
func testServer(t *testing.T, edit func(c *serveConfig)) *httptest.Server {
	t.Helper()
	c := serveConfig{maxBody: httpapi.DefaultMaxBody, maxSamples: httpapi.DefaultMaxSamples, maxWork: httpapi.DefaultMaxWork,
		timeout: httpapi.DefaultTimeout, queue: httpapi.DefaultQueue, drain: httpapi.DefaultDrain}
	if edit != nil {
		edit(&c)
	}
	require.Empty(t, c.validate())
	h, _, err := newHandler(c, slog.New(slog.NewJSONHandler(io.Discard, nil)))
	require.NoError(t, err)
	ts := httptest.NewServer(h)
	t.Cleanup(func() {
		ts.Close()
		h.Close()
	})
	return ts
}

var (
	post = testhttp.Post
	get  = testhttp.Get
)

// demoSampleJSON is the demo's own sample, as the CLI explains it by default.
func demoSampleJSON(t *testing.T) string {
	t.Helper()
	l, err := loadModel("", "")
	require.NoError(t, err)
	var v []float64
	require.NoError(t, json.Unmarshal(l.demo.Sample, &v))
	return string(l.demo.Sample)
}

func TestServeExplainIsTheCLIDocument(t *testing.T) {
	ts := testServer(t, nil)
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
		{`{"inputs":[` + sample + `],"method":"grad","abs":true}`, []string{"-method", "grad", "-abs"}},
		{`{"inputs":[` + sample + `],"method":"smoothgrad","variant":"squared","samples":8}`, []string{"-method", "smoothgrad", "-variant", "squared", "-samples", "8"}},
		{`{"inputs":[` + sample + `],"baseline":"median","steps":16}`, []string{"-baseline", "median", "-steps", "16"}},
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
func softmaxServer(t *testing.T) (*httptest.Server, []float64, []float64, string) {
	t.Helper()
	model, x, y, _ := softmaxCase(t)
	ts := testServer(t, func(c *serveConfig) { c.modelPath = model })
	return ts, x, y, model
}

func floatsJSON(v []float64) string {
	b, _ := json.Marshal(v)
	return string(b)
}

func TestServeBackendSoftmax(t *testing.T) {
	ts, x, y, model := softmaxServer(t)

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

func TestServeLimitFlags(t *testing.T) {
	// -max-samples and -max-work reach the handler: two samples of the
	// demo are one too many for -max-samples 1, and integrated gradients at
	// 16 trapezoid points cost each f(x), f(x′), 16 gradients and the
	// output at the baseline, 19, over -max-work 18.
	sample := demoSampleJSON(t)
	ts := testServer(t, func(c *serveConfig) { c.maxSamples = 1 })
	code, _, body := post(t, ts.URL+"/v1/predict", `{"inputs": [`+sample+`, `+sample+`]}`)
	assert.Equal(t, http.StatusRequestEntityTooLarge, code)
	assert.Contains(t, body, "more than the 1 sample one request may have")
	ts = testServer(t, func(c *serveConfig) { c.maxWork = 18 })
	code, _, body = post(t, ts.URL+"/v1/explain", `{"inputs": [`+sample+`], "steps": 16}`)
	assert.Equal(t, http.StatusRequestEntityTooLarge, code)
	assert.Contains(t, body, "costs up to 19 model evaluations (1 sample, 19 each), over this server's budget of 18")
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
		{[]string{"-max-samples", "0"}, "-max-samples must be at least 1, got 0"},
		{[]string{"-max-work", "-5"}, "-max-work must be at least 1, got -5"},
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
		got, err := httpapi.ParseBytes(in)
		require.NoError(t, err, in)
		assert.Equal(t, want, got, in)
	}
	assert.Equal(t, "8MiB", httpapi.FormatBytes(8<<20))
	assert.Equal(t, "1000", httpapi.FormatBytes(1000))
}

func TestServeVocab(t *testing.T) {
	// serve -vocab reads texts in "inputs" with the file's vocabulary
	// instead of the model's: here the tickets demo's tokens with a prefix,
	// so that the file's words map to the model's ids and name the tokens.
	s, err := demo.Get("tickets")
	require.NoError(t, err)
	m, err := explain.Decode(s.Model, s.ModelFile, explain.DecodeOptions{})
	require.NoError(t, err)
	var lines []string
	for _, tok := range m.Meta.Vocabulary {
		if !strings.HasPrefix(tok, "[") {
			tok = "w_" + tok
		}
		lines = append(lines, tok)
	}
	dir := t.TempDir()
	model, vocab := filepath.Join(dir, "tickets.onnx"), filepath.Join(dir, "vocab.txt")
	require.NoError(t, os.WriteFile(model, s.Model, 0o644))
	require.NoError(t, os.WriteFile(vocab, []byte(strings.Join(lines, "\n")+"\n"), 0o644))
	ts := testServer(t, func(c *serveConfig) { c.modelPath, c.vocab = model, vocab })

	words := strings.Fields(strings.TrimSpace(string(s.Sample)))
	ids, err := m.Vocabulary().IDs(strings.Join(words, " "), 16)
	require.NoError(t, err)
	for i := range words {
		words[i] = "w_" + words[i]
	}
	quoted, _ := json.Marshal(strings.Join(words, " "))
	code, _, byText := post(t, ts.URL+"/v1/explain", `{"inputs": [`+string(quoted)+`]}`)
	require.Equal(t, 200, code, byText)
	var doc struct {
		Explanations []struct {
			Attributions []float64 `json:"attributions"`
			Tokens       []string  `json:"tokens"`
		} `json:"explanations"`
	}
	require.NoError(t, json.Unmarshal([]byte(byText), &doc))
	assert.Equal(t, words, doc.Explanations[0].Tokens[:len(words)])
	raw, _ := json.Marshal(ids)
	code, _, byIDs := post(t, ts.URL+"/v1/explain", `{"inputs": [`+string(raw)+`]}`)
	require.Equal(t, 200, code, byIDs)
	assert.JSONEq(t, byIDs, byText)
}
