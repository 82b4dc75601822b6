package main

import (
	"encoding/csv"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"codeberg.org/sbinet/npyio/npy"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

type explainDoc struct {
	Model struct {
		Path   string `json:"path"`
		SHA256 string `json:"sha256"`
		Input  string `json:"input"`
		Output string `json:"output"`
	} `json:"model"`
	Method       string         `json:"method"`
	Settings     map[string]any `json:"settings"`
	Explanations []struct {
		Index           int       `json:"index"`
		Target          *int      `json:"target"`
		Outputs         []float64 `json:"outputs"`
		Attributions    []float64 `json:"attributions"`
		Shape           []int     `json:"shape"`
		BaselineOutputs []float64 `json:"baseline_outputs"`
		Completeness    *struct {
			Sum         float64 `json:"sum"`
			Expected    float64 `json:"expected"`
			RelativeGap float64 `json:"relative_gap"`
			Tolerance   float64 `json:"tolerance"`
			Judged      bool    `json:"judged"`
			OK          bool    `json:"ok"`
		} `json:"completeness"`
		Points       int     `json:"points"`
		Exact        bool    `json:"exact"`
		Pieces       int     `json:"pieces"`
		ExactSkipped string  `json:"exact_skipped"`
		Error        *string `json:"error"`
		Groups       *struct {
			Names        []string  `json:"names"`
			Attributions []float64 `json:"attributions"`
			Partition    bool      `json:"partition"`
		} `json:"groups"`
	} `json:"explanations"`
}

func explainJSONRun(t *testing.T, wantCode int, args ...string) (explainDoc, string) {
	t.Helper()
	code, out, errs := cli(t, append([]string{"explain", "-format", "json"}, args...)...)
	require.Equal(t, wantCode, code, errs)
	var doc explainDoc
	require.NoError(t, json.Unmarshal([]byte(out), &doc), out)
	return doc, errs
}

func sum(v []float64) float64 {
	s := 0.0
	for _, x := range v {
		s += x
	}
	return s
}

// softmaxCase is node/test_softmax_example: y = Softmax(x), x of shape [1,3]
// (python3-onnx 1.12.0), with its backend data set.
func softmaxCase(t *testing.T) (model string, x, y []float64, xpb string) {
	t.Helper()
	dir := caseDir(t, "node/test_softmax_example")
	in, out := setFiles(t, dir)
	_, x = readPBTensor(t, in[0])
	_, y = readPBTensor(t, out[0])
	require.Len(t, x, 3)
	require.Len(t, y, 3)
	return filepath.Join(dir, "model.onnx"), x, y, in[0]
}

func TestExplainIGSoftmax(t *testing.T) {
	model, _, y, xpb := softmaxCase(t)
	doc, _ := explainJSONRun(t, exitOK, "-model", model, "-input", xpb)

	raw, err := os.ReadFile(model)
	require.NoError(t, err)
	assert.Len(t, doc.Model.SHA256, 64) // hex SHA-256 (FIPS 180-4: 256 bits)
	assert.NotContains(t, string(raw), doc.Model.SHA256)
	assert.Equal(t, "x", doc.Model.Input)  // graph input (python3-onnx 1.12.0)
	assert.Equal(t, "y", doc.Model.Output) // graph output (python3-onnx 1.12.0)
	assert.Equal(t, "integrated-gradients", doc.Method)
	assert.Equal(t, []any{map[string]any{"kind": "zero"}}, doc.Settings["baselines"])
	assert.Equal(t, 0.005, doc.Settings["tolerance"])

	require.Len(t, doc.Explanations, 1)
	e := doc.Explanations[0]
	require.Nil(t, e.Error)
	assertClose(t, y, e.Outputs, "outputs vs output_0.pb (ONNX backend test data 1.12.0)")
	require.NotNil(t, e.Target)
	assert.Equal(t, argmax(y), *e.Target, "top target is the argmax of output_0.pb")
	assert.Equal(t, []int{3}, e.Shape)
	// Closed form: Softmax(0) = (1/3, 1/3, 1/3) for three classes.
	assertClose(t, []float64{1.0 / 3, 1.0 / 3, 1.0 / 3}, e.BaselineOutputs, "baseline outputs")
	require.NotNil(t, e.Completeness)
	assert.True(t, e.Completeness.OK)
	assert.True(t, e.Completeness.Judged)
	// Completeness (Sundararajan et al. 2017, Proposition 1):
	// Σ a_i = F(x) − F(0) = y_top − 1/3, within the requested tolerance.
	want := y[*e.Target] - 1.0/3
	assert.InDelta(t, want, sum(e.Attributions), 0.005*math.Abs(want)+1e-6)
	// A Softmax of the input itself is piecewise-linear (one piece) up to
	// its head: -steps auto integrates exactly, without gradient passes.
	assert.True(t, e.Exact)
	assert.Equal(t, 1, e.Pieces)
	assert.Zero(t, e.Points)
	assert.Equal(t, true, doc.Settings["auto"])
	assert.EqualValues(t, 1024, doc.Settings["max_pieces"])

	// -steps refine integrates by quadrature, within the tolerance.
	doc, _ = explainJSONRun(t, exitOK, "-model", model, "-input", xpb, "-steps", "refine")
	e = doc.Explanations[0]
	assert.False(t, e.Exact)
	assert.Greater(t, e.Points, 0)
	assert.NotContains(t, doc.Settings, "max_pieces")
	assert.InDelta(t, want, sum(e.Attributions), 0.005*math.Abs(want)+1e-6)
}

func TestExplainExactRefused(t *testing.T) {
	// y = erf(x) (node/test_erf, python3-onnx 1.12.0) is not
	// piecewise-linear: -steps exact is a usage error that names the
	// operator, and -steps auto integrates by quadrature and says why.
	dir := caseDir(t, "node/test_erf")
	in, _ := setFiles(t, dir)
	model := filepath.Join(dir, "model.onnx")
	code, out, errs := cli(t, "explain", "-model", model, "-input", in[0], "-steps", "exact")
	assert.Equal(t, exitUsage, code)
	assert.Empty(t, out)
	assert.Contains(t, errs, "-steps exact: not a piecewise-linear network")
	assert.Contains(t, errs, "operator Erf")

	doc, _ := explainJSONRun(t, exitOK, "-model", model, "-input", in[0], "-target", "0")
	e := doc.Explanations[0]
	require.Nil(t, e.Error)
	assert.False(t, e.Exact)
	assert.Greater(t, e.Points, 0)
	assert.Contains(t, e.ExactSkipped, "operator Erf")
}

func TestExplainLogitsClosedForm(t *testing.T) {
	// With -logits the explained value is the input of the Softmax, here x
	// itself, so F(x) = x_k is linear and integrated gradients from the zero
	// baseline are exact: a_i = (x_i − 0)·∂x_k/∂x_i = x_k·δ_ik
	// (Sundararajan et al. 2017, eq. 1).
	model, x, _, xpb := softmaxCase(t)
	for _, target := range []string{"0", "2"} {
		doc, _ := explainJSONRun(t, exitOK, "-model", model, "-input", xpb, "-logits", "-target", target, "-steps", "2")
		e := doc.Explanations[0]
		require.Nil(t, e.Error)
		k := *e.Target
		assert.Equal(t, target, string(rune('0'+k)))
		want := make([]float64, 3)
		want[k] = x[k]
		assertClose(t, want, e.Attributions, "logit attributions")
		assertClose(t, x, e.Outputs, "logits are the inputs")
		assert.True(t, e.Completeness.OK)
	}
}

func TestExplainGradientSoftmaxJacobian(t *testing.T) {
	// ∂s_k/∂x_i = s_k(δ_ik − s_i), the softmax Jacobian (closed form, e.g.
	// Bridle 1990), evaluated at s = output_0.pb of the backend data.
	model, _, s, xpb := softmaxCase(t)
	doc, _ := explainJSONRun(t, exitOK, "-model", model, "-input", xpb, "-method", "grad", "-target", "1")
	e := doc.Explanations[0]
	require.Nil(t, e.Error)
	assert.Nil(t, e.Completeness) // the gradient has no reference point
	k := 1
	want := make([]float64, 3)
	for i := range want {
		d := 0.0
		if i == k {
			d = 1
		}
		want[i] = s[k] * (d - s[i])
	}
	for i := range want {
		assert.InDelta(t, want[i], e.Attributions[i], 1e-5, "∂s_1/∂x_%d", i)
	}
}

// batchCSV writes three samples under a header a,b,c: x, a sample with a
// NaN, and x again.
func batchCSV(t *testing.T, x []float64) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), "batch.csv")
	writeCSV(t, p, []int{3, 3}, []float64{x[0], x[1], x[2], x[0], math.NaN(), x[2], x[0], x[1], x[2]}, []string{"a", "b", "c"})
	raw, err := os.ReadFile(p)
	require.NoError(t, err)
	require.Contains(t, string(raw), "NaN")
	return p
}

func TestExplainBadSampleInBatch(t *testing.T) {
	model, x, y, _ := softmaxCase(t)
	in := batchCSV(t, x)
	doc, errs := explainJSONRun(t, exitFail, "-model", model, "-input", in)
	require.Len(t, doc.Explanations, 3)
	for _, i := range []int{0, 2} {
		e := doc.Explanations[i]
		assert.Equal(t, i, e.Index)
		require.Nil(t, e.Error, "sample %d", i)
		assertClose(t, y, e.Outputs, "outputs vs output_0.pb (ONNX backend test data 1.12.0)")
		assert.True(t, e.Completeness.OK, "sample %d", i)
	}
	bad := doc.Explanations[1]
	require.NotNil(t, bad.Error)
	assert.Contains(t, *bad.Error, "index 1")
	assert.Contains(t, *bad.Error, "NaN")
	assert.Nil(t, bad.Target)
	assert.Nil(t, bad.Attributions)
	assert.Contains(t, errs, "sample 1")
	assert.Contains(t, errs, "1 of 3 samples failed")

	// CSV: a row per feature of each explained sample, named by the header.
	code, out, _ := cli(t, "explain", "-model", model, "-input", in, "-format", "csv")
	assert.Equal(t, exitFail, code)
	recs, err := csv.NewReader(strings.NewReader(out)).ReadAll()
	require.NoError(t, err)
	require.Len(t, recs, 1+2*3)
	assert.Equal(t, []string{"sample", "feature", "value", "attribution"}, recs[0])
	assert.Equal(t, []string{"0", "a"}, recs[1][:2])
	assert.Equal(t, []string{"2", "c"}, recs[6][:2])

	// npy: (samples, 3) float64, the failed row NaN, the others as in JSON.
	p := filepath.Join(t.TempDir(), "attr.npy")
	code, out, _ = cli(t, "explain", "-model", model, "-input", in, "-format", "npy", "-out", p)
	assert.Equal(t, exitFail, code)
	assert.Empty(t, out)
	f, err := os.Open(p)
	require.NoError(t, err)
	defer f.Close()
	r, err := npy.NewReader(f)
	require.NoError(t, err)
	assert.Equal(t, []int{3, 3}, r.Header.Descr.Shape)
	var got []float64
	require.NoError(t, r.Read(&got))
	for j := 0; j < 3; j++ {
		assert.InDelta(t, doc.Explanations[0].Attributions[j], got[j], 1e-12)
		assert.True(t, math.IsNaN(got[3+j]))
		assert.InDelta(t, doc.Explanations[2].Attributions[j], got[6+j], 1e-12)
	}

	// Table: names from the header, a completeness line, signed bars.
	code, out, _ = cli(t, "explain", "-model", model, "-input", in)
	assert.Equal(t, exitFail, code)
	assert.Regexp(t, `(?m)^  a\s+-?[0-9.]+\s+[-+0-9.e]+\s+ *[▐█]*│`, out)
	assert.Contains(t, out, "sample 1: error:")
	assert.Regexp(t, `completeness: sum \S+  expected \S+  gap \S+  relative gap \S+  tolerance 0.005  ok`, out)
	assert.Contains(t, out, "█")
}

func TestExplainConvModel(t *testing.T) {
	// pytorch-converted/test_Conv1d_pad1size1: input "0" [1,4,1], one Conv
	// with initializers (python3-onnx 1.12.0). A convolution is linear in its
	// input, so integrated gradients meet completeness at any point count.
	dir := caseDir(t, "pytorch-converted/test_Conv1d_pad1size1")
	in, outs := setFiles(t, dir)
	_, want := readPBTensor(t, outs[0])
	doc, _ := explainJSONRun(t, exitOK, "-model", filepath.Join(dir, "model.onnx"), "-input", in[0])
	e := doc.Explanations[0]
	require.Nil(t, e.Error)
	assertClose(t, want, e.Outputs, "outputs vs output_0.pb (ONNX backend test data 1.12.0)")
	assert.Equal(t, []int{4, 1}, e.Shape)
	assert.Len(t, e.Attributions, 4)
	assert.True(t, e.Completeness.OK)
}

func TestExplainSettings(t *testing.T) {
	model, x, _, xpb := softmaxCase(t)
	doc, _ := explainJSONRun(t, exitOK, "-model", model, "-input", xpb, "-steps", "8", "-rule", "gauss-legendre")
	assert.Equal(t, "gauss-legendre", doc.Settings["rule"])
	assert.Equal(t, 8.0, doc.Settings["points"])
	assert.Equal(t, 8, doc.Explanations[0].Points) // 8 nodes, one baseline

	// The sample itself as baseline: x − x′ = 0, so every attribution is 0
	// (Sundararajan et al. 2017, eq. 1) and F(x) − F(x′) = 0.
	doc, _ = explainJSONRun(t, exitOK, "-model", model, "-input", xpb, "-baseline", xpb)
	e := doc.Explanations[0]
	require.Nil(t, e.Error)
	assert.Equal(t, []float64{0, 0, 0}, e.Attributions)
	assert.InDelta(t, 0, e.Completeness.Expected, 1e-12)

	// Groups: sums over a partition add up to the feature sum (additivity
	// of the sum, common practice).
	g := filepath.Join(t.TempDir(), "groups.json")
	require.NoError(t, os.WriteFile(g, []byte(`[{"name":"first two","indices":[0,1]},{"name":"last","indices":[2]}]`), 0o644))
	doc, _ = explainJSONRun(t, exitOK, "-model", model, "-input", xpb, "-groups", g)
	e = doc.Explanations[0]
	require.NotNil(t, e.Groups)
	assert.Equal(t, []string{"first two", "last"}, e.Groups.Names)
	assert.True(t, e.Groups.Partition)
	assert.InDelta(t, e.Attributions[0]+e.Attributions[1], e.Groups.Attributions[0], 1e-12)
	assert.InDelta(t, e.Attributions[2], e.Groups.Attributions[1], 1e-12)

	// Expected gradients need a reference set; the library's tolerance for
	// a method complete only in expectation is recorded.
	ref := filepath.Join(t.TempDir(), "ref.json")
	writeJSON(t, ref, []int{2, 3}, []float64{0, 0, 0, x[2], x[1], x[0]})
	doc, _ = explainJSONRun(t, exitOK, "-model", model, "-input", xpb, "-method", "expected-grad", "-reference", ref, "-samples", "20")
	e = doc.Explanations[0]
	require.Nil(t, e.Error)
	require.NotNil(t, e.Completeness)
	assert.Equal(t, 20.0, doc.Settings["samples"])
	assert.Equal(t, 20, e.Points)

	// An output the model does not have is a usage error.
	code, _, errs := cli(t, "explain", "-model", model, "-input", xpb, "-output", "z")
	assert.Equal(t, exitUsage, code)
	assert.Contains(t, errs, `-output "z" is not an output of the model (outputs: y)`)
	// A model with three runtime inputs cannot be explained.
	gemm := caseDir(t, "node/test_gemm_default_vector_bias")
	code, _, errs = cli(t, "explain", "-model", filepath.Join(gemm, "model.onnx"), "-input", xpb)
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errs, "one runtime input, this one has 3 (a, b, c)")
}

func TestExplainDemoHook(t *testing.T) {
	model, x, y, _ := softmaxCase(t)
	raw, err := os.ReadFile(model)
	require.NoError(t, err)
	sample := []byte(f32(x[0]) + "," + f32(x[1]) + "," + f32(x[2]) + "\n")
	old := demoModel
	t.Cleanup(func() { demoModel = old })
	demoModel = func() ([]byte, []byte, string) { return raw, sample, "softmax.csv" }

	doc, _ := explainJSONRun(t, exitOK)
	assert.Equal(t, "demo:softmax.csv", doc.Model.Path)
	require.Len(t, doc.Explanations, 1)
	assertClose(t, y, doc.Explanations[0].Outputs, "outputs vs output_0.pb (ONNX backend test data 1.12.0)")
}

func TestExplainMalformedSamplesKeepTheRest(t *testing.T) {
	// A row that cannot be read (wrong length, a field that is not a number)
	// costs only itself: the good samples are explained as they would be
	// alone, and their outputs match output_0.pb (ONNX backend test data
	// 1.12.0, node/test_softmax_example).
	model, x, y, _ := softmaxCase(t)
	dir := t.TempDir()
	num := func(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }
	good := num(x[0]) + "," + num(x[1]) + "," + num(x[2])
	csvPath := filepath.Join(dir, "rows.csv")
	require.NoError(t, os.WriteFile(csvPath, []byte("a,b,c\n"+good+"\n1,oops,3\n1,2\n"+good+"\n"), 0o644))
	jsonPath := filepath.Join(dir, "rows.json")
	require.NoError(t, os.WriteFile(jsonPath, []byte("[["+good+"],[1,2],["+good+"],[[1],[2],[3]]]"), 0o644))
	alone := filepath.Join(dir, "alone.json")
	require.NoError(t, os.WriteFile(alone, []byte("["+good+"]"), 0o644))

	ref, _ := explainJSONRun(t, exitOK, "-model", model, "-input", alone)
	require.Len(t, ref.Explanations, 1)
	want := ref.Explanations[0].Attributions

	for _, tc := range []struct {
		path      string
		good, bad []int
		msgs      []string
	}{
		{csvPath, []int{0, 3}, []int{1, 2}, []string{`line 3 (sample 1), field 1: "oops" is not a number`, "line 4 (sample 2): expected 3 values, got 2"}},
		{jsonPath, []int{0, 2}, []int{1, 3}, []string{"expected 3 values (shape [3]), got 2", "expected a sample of shape [3] or 3 flat values, got shape [3 1]"}},
	} {
		doc, errs := explainJSONRun(t, exitFail, "-model", model, "-input", tc.path)
		require.Len(t, doc.Explanations, 4, tc.path)
		for _, i := range tc.good {
			e := doc.Explanations[i]
			require.Nil(t, e.Error, "%s sample %d", tc.path, i)
			assertClose(t, y, e.Outputs, "outputs vs output_0.pb")
			assert.Equal(t, want, e.Attributions, "%s sample %d explained as if alone", tc.path, i)
		}
		for k, i := range tc.bad {
			e := doc.Explanations[i]
			require.NotNil(t, e.Error, "%s sample %d", tc.path, i)
			assert.Contains(t, *e.Error, tc.msgs[k])
			assert.Nil(t, e.Attributions)
		}
		assert.Contains(t, errs, "2 of 4 samples failed")
	}

	// predict needs every sample: it refuses the file and names the first bad row.
	code, _, errs := cli(t, "predict", "-model", model, "-input", csvPath)
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errs, "line 3 (sample 1)")
}
