package main

import (
	"bytes"
	"encoding/json"
	"io"
	"math"
	"net/http"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/onnxlite"
)

func postScore(t *testing.T, url, body string) (int, []byte) {
	t.Helper()
	resp, err := http.Post(url+"/score", "application/json", strings.NewReader(body))
	require.NoError(t, err)
	defer resp.Body.Close()
	raw, err := io.ReadAll(resp.Body)
	require.NoError(t, err)
	return resp.StatusCode, raw
}

func readPB(t *testing.T, path string) []float64 {
	t.Helper()
	raw, err := os.ReadFile(path)
	require.NoError(t, err)
	tt, err := onnxlite.DecodeTensor(bytes.NewReader(raw), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	v, err := tt.Float64s()
	require.NoError(t, err)
	return v
}

// TestScoreSoftmax serves node/test_softmax_example of the ONNX backend
// test data (y = Softmax(x), three classes, no metadata, zero baseline).
func TestScoreSoftmax(t *testing.T) {
	dir := filepath.Join(onnxtestdata.Dir(t), "node", "test_softmax_example")
	model, _, err := load(filepath.Join(dir, "model.onnx"), "")
	require.NoError(t, err)
	svc, err := newService(model, nil)
	require.NoError(t, err)
	ts := httptest.NewServer(svc.handler())
	defer ts.Close()

	in, out := onnxtestdata.SetFiles(filepath.Join(dir, "test_data_set_0"))
	x, y := readPB(t, in[0]), readPB(t, out[0])
	body, _ := json.Marshal(scoreRequest{Features: x})
	code, raw := postScore(t, ts.URL, string(body))
	require.Equal(t, http.StatusOK, code, string(raw))
	var sc Score
	require.NoError(t, json.Unmarshal(raw, &sc))

	top := 0
	for i := range y {
		if y[i] > y[top] {
			top = i
		}
	}
	assert.Equal(t, top, sc.ClassIndex, "argmax of output_0.pb (ONNX backend test data 1.12.0)")
	assert.InDelta(t, y[top], sc.Probability, 1e-6, "output_0.pb (ONNX backend test data 1.12.0)")
	// Closed form: Softmax(0) = 1/3 for every class of three.
	assert.InDelta(t, 1.0/3, sc.BaselineProbability, 1e-6)
	require.Len(t, sc.Reasons, 3)
	total := 0.0
	for i, r := range sc.Reasons {
		total += r.Attribution
		assert.Regexp(t, `^x\[[0-2]\]$`, r.Feature)
		if i > 0 {
			assert.GreaterOrEqual(t, math.Abs(sc.Reasons[i-1].Attribution), math.Abs(r.Attribution))
		}
	}
	// All three features are reasons here, so they add up to
	// y_top − Softmax(0)_top (Sundararajan et al. 2017, Proposition 1).
	assert.True(t, sc.Complete)
	assert.InDelta(t, y[top]-1.0/3, total, 0.005*math.Abs(y[top]-1.0/3))
}

func TestScoreDemoConcurrent(t *testing.T) {
	model, ref, err := load("", "")
	require.NoError(t, err)
	svc, err := newService(model, ref)
	require.NoError(t, err)
	ts := httptest.NewServer(svc.handler())
	defer ts.Close()

	sample := `{"features":[77.2,7.14,5.49,1.29,145.5,42,6277,22.7]}`
	code, want := postScore(t, ts.URL, sample)
	require.Equal(t, http.StatusOK, code, string(want))
	var sc Score
	require.NoError(t, json.Unmarshal(want, &sc))
	assert.Contains(t, []string{"normal", "degraded", "failing"}, sc.Class)
	require.Len(t, sc.Reasons, 3)
	units := map[string]string{ // the model's feature_units metadata
		"bearing_temp": "°C", "vibration_rms": "mm/s", "discharge_pressure": "bar", "suction_pressure": "bar",
		"flow": "m³/h", "motor_current": "A", "hours_since_service": "h", "ambient_temp": "°C",
	}
	for _, r := range sc.Reasons {
		assert.Equal(t, units[r.Feature], r.Unit, r.Feature)
	}
	assert.GreaterOrEqual(t, sc.Probability, 0.0)
	assert.LessOrEqual(t, sc.Probability, 1.0)

	// One network shared by 16 goroutines gives every one of them the
	// answer a lone request gets.
	var wg sync.WaitGroup
	got := make([][]byte, 16)
	for i := range got {
		wg.Add(1)
		go func() {
			defer wg.Done()
			resp, err := http.Post(ts.URL+"/score", "application/json", strings.NewReader(sample))
			if err != nil {
				return
			}
			defer resp.Body.Close()
			got[i], _ = io.ReadAll(resp.Body)
		}()
	}
	wg.Wait()
	for i := range got {
		assert.JSONEq(t, string(want), string(got[i]), "request %d", i)
	}

	for body, says := range map[string]string{
		`{"features":[1,2,3]}`:   "expected 8 features, got 3",
		`{"features":[1,2,3`:     "expected {\"features\": [numbers]}",
		`{"inputs":[1,2,3]}`:     `unknown field "inputs"`,
		`{"features":["a",2,3]}`: "expected {\"features\": [numbers]}",
	} {
		code, raw := postScore(t, ts.URL, body)
		assert.Equal(t, http.StatusBadRequest, code, body)
		var e map[string]string
		require.NoError(t, json.Unmarshal(raw, &e))
		assert.Contains(t, e["error"], says)
	}
}

// TestBuildsOutsideTheRepository copies the service into a module of its
// own that requires apportion through a replace directive pointing at this
// repository, as a user who copies it does, and builds it: the go command
// refuses a package of another module that imports an internal package.
func TestBuildsOutsideTheRepository(t *testing.T) {
	goBin, err := exec.LookPath("go")
	require.NoError(t, err)
	repo, err := filepath.Abs("../..")
	require.NoError(t, err)
	dir := t.TempDir()
	src, err := os.ReadFile("main.go")
	require.NoError(t, err)
	require.NoError(t, os.WriteFile(filepath.Join(dir, "main.go"), src, 0o644))
	goMod := "module example.com/pumpscore\n\ngo 1.26\n\n" +
		"require github.com/apportion/apportion v0.0.0\n\n" +
		"replace github.com/apportion/apportion => " + repo + "\n"
	require.NoError(t, os.WriteFile(filepath.Join(dir, "go.mod"), []byte(goMod), 0o644))
	// The repository's checksums cover every module it needs, so that the
	// build resolves them from the module cache.
	sums, err := os.ReadFile(filepath.Join(repo, "go.sum"))
	require.NoError(t, err)
	require.NoError(t, os.WriteFile(filepath.Join(dir, "go.sum"), sums, 0o644))

	cmd := exec.Command(goBin, "build", "-o", filepath.Join(dir, "pumpscore"), ".")
	cmd.Dir = dir
	cmd.Env = append(os.Environ(), "GOFLAGS=-mod=mod", "GOWORK=off")
	out, err := cmd.CombinedOutput()
	require.NoError(t, err, "%s", out)
	st, err := os.Stat(filepath.Join(dir, "pumpscore"))
	require.NoError(t, err)
	assert.True(t, st.Mode().IsRegular())
}
