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
	assert.Equal(t, `-steps must be auto, exact, refine or a number from 1 to 65536, got "100000"`, fe.Wording(flag))
	assert.Equal(t, `"steps" must be auto, exact, refine or a number from 1 to 65536, got "100000"`, fe.Wording(field))

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

func TestSettingsSteps(t *testing.T) {
	// The steps words choose the exact integral or quadrature; a count
	// fixes the quadrature's points.
	s := explain.Defaults()
	assert.Equal(t, gradattr.ExactAuto, s.Exact, "the default is auto")
	for _, c := range []struct {
		text  string
		steps int
		exact gradattr.ExactMode
	}{{"exact", 0, gradattr.ExactAlways}, {"refine", 0, gradattr.ExactNever}, {"auto", 0, gradattr.ExactAuto}, {"16", 16, gradattr.ExactAuto}} {
		require.NoError(t, s.Set(explain.FieldSteps, c.text))
		assert.Equal(t, c.steps, s.Steps, c.text)
		assert.Equal(t, c.exact, s.Exact, c.text)
	}
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
