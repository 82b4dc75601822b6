package explain_test

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"strconv"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/internal/testfiles"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// softmax is node/test_softmax_example of the ONNX backend test data
// 1.12.0: y = Softmax(x), x of shape [1, 3], compiled, with its input and
// output values.
func softmax(t *testing.T) (m *explain.Model, x, y []float64) {
	t.Helper()
	dir := filepath.Join(onnxtestdata.Dir(t), "node", "test_softmax_example")
	m, err := explain.ReadModel(filepath.Join(dir, "model.onnx"))
	require.NoError(t, err)
	require.NoError(t, m.Compile(explain.CompileOptions{}))
	in, out := onnxtestdata.SetFiles(filepath.Join(dir, "test_data_set_0"))
	_, x = testfiles.ReadPB(t, in[0])
	_, y = testfiles.ReadPB(t, out[0])
	return m, x, y
}

func TestSettingsWording(t *testing.T) {
	flag := func(f explain.Field) string { return "-" + string(f) }
	field := func(f explain.Field) string { return strconv.Quote(string(f)) }
	s := explain.Defaults()
	err := s.Set(explain.FieldSteps, "100000")
	var fe *explain.FieldError
	require.ErrorAs(t, err, &fe)
	assert.ErrorIs(t, err, explain.ErrSettings)
	assert.Equal(t, explain.FieldSteps, fe.Field)
	assert.Equal(t, `-steps must be auto or a number from 1 to 65536, got "100000"`, fe.Wording(flag))
	assert.Equal(t, `"steps" must be auto or a number from 1 to 65536, got "100000"`, fe.Wording(field))

	// A parameter the method does not read names both fields.
	require.NoError(t, s.Set(explain.FieldNoise, "0.2"))
	require.ErrorAs(t, s.Check(), &fe)
	assert.Equal(t, `"noise" applies to "method" smoothgrad only, not integrated-gradients`, fe.Wording(field))
	require.NoError(t, s.Set(explain.FieldMethod, "smoothgrad"))
	assert.NoError(t, s.Check())

	// Aliases and canonical names set the same method.
	for _, name := range []string{"ig", "integrated-gradients"} {
		require.NoError(t, s.Set(explain.FieldMethod, name))
		assert.Equal(t, gradattr.MethodIntegratedGradients, s.Method)
	}
	require.ErrorAs(t, s.Set(explain.FieldMethod, "lime"), &fe)
	assert.Contains(t, fe.Wording(flag), "-method must be one of gradient (grad), ")
}

func TestExplainLogitsClosedForm(t *testing.T) {
	// With logits the explained value is the input of the Softmax, x
	// itself: F(x) = x_k is linear, and integrated gradients from the zero
	// baseline are exact, a_i = x_k·δ_ik (Sundararajan et al. 2017, eq. 1),
	// whatever the rule; the outputs are then x (backend input_0.pb).
	m, x, _ := softmax(t)
	head, err := m.Head("", true)
	require.NoError(t, err)
	s := explain.Defaults()
	s.Target, s.Steps = 2, 2
	ex, err := explain.New(m, head, s)
	require.NoError(t, err)
	spec, err := m.Input()
	require.NoError(t, err)
	b, err := samples.ReadJSON(bytes.NewReader([]byte("["+testfiles.F32(x[0])+","+testfiles.F32(x[1])+","+testfiles.F32(x[2])+"]")), spec)
	require.NoError(t, err)
	rep, err := ex.Explain(context.Background(), b, nil)
	require.NoError(t, err)
	require.Len(t, rep.Explanations, 1)
	e := rep.Explanations[0]
	require.NoError(t, e.Err)
	assert.InDeltaSlice(t, []float64{0, 0, x[2]}, e.Result.Attributions, 1e-6)
	assert.InDeltaSlice(t, x, e.Result.Outputs, 1e-6)
	assert.True(t, e.Result.Completeness.OK)

	// The document records the canonical method and the settings once.
	var buf bytes.Buffer
	require.NoError(t, rep.WriteJSON(&buf))
	var doc map[string]any
	require.NoError(t, json.Unmarshal(buf.Bytes(), &doc))
	assert.Equal(t, "integrated-gradients", doc["method"])
	settings := doc["settings"].(map[string]any)
	assert.Equal(t, []any{map[string]any{"kind": "zero"}}, settings["baselines"])
	assert.Equal(t, 2.0, settings["points"])
	assert.Equal(t, 2.0, settings["target"])
	assert.NotContains(t, settings, "baseline")
}

func TestExplainerChecks(t *testing.T) {
	// The softmax model takes 3 values per sample (python3-onnx 1.12.0).
	m, _, _ := softmax(t)
	head, err := m.Head("", false)
	require.NoError(t, err)
	ref := &explain.Dataset{Name: "ref.json", Batch: &samples.Batch{Shape: []int{1, 2}, Data: []float64{1, 2}, Samples: 1}}
	for _, c := range []struct {
		edit  func(s *explain.Settings)
		says  string
		input bool
	}{
		{func(s *explain.Settings) { s.Method = gradattr.MethodExpectedGradients }, "method expected-gradients needs reference", false},
		{func(s *explain.Settings) { s.Method, s.Reference = gradattr.MethodExpectedGradients, ref }, "reference ref.json: expected samples of 3 values, got 2", true},
		{func(s *explain.Settings) { s.Baseline = explain.Baseline{Kind: gradattr.BaselineBlur, Sigma: 1} }, "baseline blur needs samples with at least two axes (height, width), got shape [3]", false},
		{func(s *explain.Settings) { s.Output = "z" }, `output "z" is not an output of the model (outputs: y)`, false},
		{func(s *explain.Settings) { s.Groups = []gradattr.Group{{Name: "g", Indices: []int{3}}} }, "group 0 (\"g\") has index 3", true},
	} {
		s := explain.Defaults()
		c.edit(&s)
		_, err := explain.New(m, head, s)
		var fe *explain.FieldError
		require.ErrorAs(t, err, &fe, c.says)
		assert.Contains(t, fe.Error(), c.says)
		assert.Equal(t, c.input, fe.Input, c.says)
	}
}

func TestPredictBackendRelu(t *testing.T) {
	// node/test_relu: y = max(x, 0) on [3, 4, 5] (ONNX backend test data
	// 1.12.0, input_0.pb and output_0.pb).
	dir := filepath.Join(onnxtestdata.Dir(t), "node", "test_relu")
	m, err := explain.ReadModel(filepath.Join(dir, "model.onnx"))
	require.NoError(t, err)
	require.NoError(t, m.Compile(explain.CompileOptions{}))
	in, out := onnxtestdata.SetFiles(filepath.Join(dir, "test_data_set_0"))
	spec := samples.SpecOf(m.Inputs()[0])
	b, err := samples.ReadFile(in[0], spec, samples.Options{})
	require.NoError(t, err)
	tensor, err := b.ToTensor(spec)
	require.NoError(t, err)
	p, err := m.Predict(context.Background(), []*onnxlite.Tensor{tensor})
	require.NoError(t, err)
	_, want := testfiles.ReadPB(t, out[0])
	require.Len(t, p.Outputs, 1)
	assert.Equal(t, "y", p.Outputs[0].Name)
	assert.Equal(t, []int{3, 4, 5}, p.Outputs[0].Shape)
	assert.Equal(t, want, p.Outputs[0].Data.Values)
	assert.Equal(t, 32, p.Outputs[0].Data.Bits)
	raw, err := os.ReadFile(filepath.Join(dir, "model.onnx"))
	require.NoError(t, err)
	assert.Len(t, m.SHA256, 64)
	assert.NotContains(t, string(raw), m.SHA256)
}

// explainSoftmax explains the rows of x with the softmax model and the
// settings s, with the method given.
func explainSoftmax(t *testing.T, m *explain.Model, s explain.Settings, x ...[]float64) *explain.Report {
	t.Helper()
	head, err := m.Head("", s.Logits)
	require.NoError(t, err)
	ex, err := explain.New(m, head, s)
	require.NoError(t, err)
	var data []float64
	for _, row := range x {
		data = append(data, row...)
	}
	rep, err := ex.Explain(context.Background(), &samples.Batch{Name: "rows", Shape: []int{len(x), 3}, Data: data, Samples: len(x)}, nil)
	require.NoError(t, err)
	return rep
}

func TestWarnings(t *testing.T) {
	// y = softmax(x) (ONNX backend test data 1.12.0, node/test_softmax_example).
	// At x = (0, 0, 40), y_2 = 1/(1 + 2e^−40) ≈ 1 − 8.5e−18 (closed form):
	// saturated, so its gradient y_2(δ_2i − y_i) is below 1e−17 and the
	// gradient methods warn; its logits (x itself) are not saturated. At
	// x = 0 every y_i is 1/3, as at the zero baseline: integrated gradients
	// has no change to share out. At the backend's own input neither holds.
	m, x, _ := softmax(t)
	saturated := []float64{0, 0, 40}
	for _, method := range []gradattr.Method{gradattr.MethodGradient, gradattr.MethodGradientTimesInput, gradattr.MethodSmoothGrad} {
		s := explain.Defaults()
		s.Method = method
		rep := explainSoftmax(t, m, s, saturated, x)
		w := rep.Explanations[0].Warnings
		require.Len(t, w, 1, method)
		assert.Equal(t, explain.WarnSaturated, w[0].Code, method)
		assert.Equal(t, []explain.Field{explain.FieldLogits}, w[0].Suggest)
		assert.Contains(t, w[0].Message, "output y[2] is 1, within 1e-6 of 1")
		assert.Empty(t, rep.Explanations[1].Warnings, "%s at the backend's input", method)

		s.Logits = true
		rep = explainSoftmax(t, m, s, saturated)
		assert.Empty(t, rep.Explanations[0].Warnings, "%s of the logits", method)
	}
	// Integrated gradients of a saturated output still shares out
	// f(x) − f(0) = 1 − 1/3: no warning.
	rep := explainSoftmax(t, m, explain.Defaults(), saturated, []float64{0, 0, 0})
	assert.Empty(t, rep.Explanations[0].Warnings)
	w := rep.Explanations[1].Warnings
	require.Len(t, w, 1)
	assert.Equal(t, explain.WarnNoChange, w[0].Code)
	assert.Equal(t, []explain.Field{explain.FieldBaseline, explain.FieldLogits}, w[0].Suggest)

	// The document carries them: [] when there are none.
	var buf bytes.Buffer
	require.NoError(t, rep.WriteJSON(&buf))
	var doc struct {
		Explanations []struct {
			Warnings []map[string]any `json:"warnings"`
		} `json:"explanations"`
	}
	require.NoError(t, json.Unmarshal(buf.Bytes(), &doc))
	assert.NotNil(t, doc.Explanations[0].Warnings)
	assert.Empty(t, doc.Explanations[0].Warnings)
	require.Len(t, doc.Explanations[1].Warnings, 1)
	assert.Equal(t, "no-change", doc.Explanations[1].Warnings[0]["code"])
	assert.Equal(t, []any{"baseline", "logits"}, doc.Explanations[1].Warnings[0]["suggest"])
}

func TestNegligible(t *testing.T) {
	// The first-order effect of a gradient g_i at x_i is |g_i|·max(|x_i|, 1):
	// 1e-9 per °C at 300 °C moves the output by 3e-7, below 1e-6; at
	// 3000 °C by 3e-6. Attributions that are shares of the output (a
	// completeness report) are read as they are; SmoothGrad's squared
	// variant is rooted first.
	grad := &gradattr.Result{Attributions: []float64{1e-9, -2e-7}}
	assert.True(t, explain.Negligible(grad, []float64{300, 0.5}))
	assert.False(t, explain.Negligible(grad, []float64{3000, 0.5}))
	shares := &gradattr.Result{Attributions: []float64{5e-7, -5e-7}, Completeness: &gradattr.Completeness{}}
	assert.True(t, explain.Negligible(shares, []float64{3000, 3000}))
	squared := &gradattr.Result{Attributions: []float64{1e-14}, Settings: gradattr.Settings{Variant: "squared"}}
	assert.True(t, explain.Negligible(squared, []float64{0.5}), "√1e-14 = 1e-7")
	squared.Attributions[0] = 4e-12
	assert.False(t, explain.Negligible(squared, []float64{0.5}), "√4e-12 = 2e-6")
}
