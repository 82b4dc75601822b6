package main

import (
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/internal/ortdata"
	"github.com/apportion/apportion/onnxlite"
)

// ortCase returns the directory of an ONNX Runtime fixture (testdata/ort)
// and the .pb files of its data set.
func ortCase(t *testing.T, kind, name string) (model string, inputs, outputs []string) {
	t.Helper()
	dir := filepath.Join(ortdata.Dir(), kind, name)
	inputs, outputs = onnxtestdata.SetFiles(filepath.Join(dir, "test_data_set_0"))
	require.NotEmpty(t, inputs, name)
	return filepath.Join(dir, "model.onnx"), inputs, outputs
}

// requireOutputs compares predict's outputs with reference .pb files within
// 1e-5 + 1e-4·|want| (the bound of testdata/ort/README.md).
func requireOutputs(t *testing.T, doc predictDoc, outputs []string) {
	t.Helper()
	require.Len(t, doc.Outputs, len(outputs))
	for i, f := range outputs {
		want, err := onnxlite.DecodeTensorFile(f, onnxlite.DecodeOptions{})
		require.NoError(t, err)
		wv, err := want.Float64s()
		require.NoError(t, err)
		assert.Equal(t, want.Shape(), doc.Outputs[i].Shape)
		require.Len(t, doc.Outputs[i].Data, len(wv))
		for k, w := range wv {
			require.NotNil(t, doc.Outputs[i].Data[k])
			assert.InDelta(t, w, *doc.Outputs[i].Data[k], 1e-5+1e-4*math.Abs(w), "output %d element %d", i, k)
		}
	}
}

// TestPredictIntegerAndHalfInputs runs predict on models whose inputs are
// int64 shape parameters (a compile-time value), int64 token ids (read at
// run time by a Gather) and float16 (widened), against the outputs of ONNX
// Runtime 1.30 (testdata/ort).
func TestPredictIntegerAndHalfInputs(t *testing.T) {
	for _, c := range []struct{ kind, name string }{
		{"node", "reshape_runtime_shape_opset18"},
		{"node", "resize_runtime_sizes_opset19"},
		{"model", "text_embedding_meanpool_opset18"},
		{"model", "text_embedding_conv1d_opset26"},
		{"node", "float16_input_cast_opset21"},
		{"node", "bfloat16_input_cast_opset26"},
	} {
		t.Run(c.name, func(t *testing.T) {
			model, inputs, outputs := ortCase(t, c.kind, c.name)
			args := []string{"-model", model}
			for _, in := range inputs {
				args = append(args, "-input", in)
			}
			requireOutputs(t, predictJSON(t, args...), outputs)
		})
	}
	// Token ids from JSON rather than .pb: the same values, read as int64.
	model, inputs, outputs := ortCase(t, "model", "text_embedding_meanpool_opset18")
	ids, err := onnxlite.DecodeTensorFile(inputs[0], onnxlite.DecodeOptions{})
	require.NoError(t, err)
	vals, err := ids.Float64s()
	require.NoError(t, err)
	js := filepath.Join(t.TempDir(), "ids.json")
	writeJSON(t, js, ids.Shape(), vals)
	requireOutputs(t, predictJSON(t, "-model", model, "-input", js), outputs)
}

// TestPredictPrecisionFloat64: the backend case's reference values, near
// 1e223, overflow binary32 (max ≈ 3.4e38, IEEE 754); -precision float64
// computes them (ONNX backend test data, Debian libonnx-testdata 1.12.0).
func TestPredictPrecisionFloat64(t *testing.T) {
	dir := caseDir(t, "pytorch-operator/test_operator_addconstant")
	inputs, outputs := setFiles(t, dir)
	model := filepath.Join(dir, "model.onnx")
	doc := predictJSON(t, "-model", model, "-input", inputs[0], "-precision", "float64")
	want, err := onnxlite.DecodeTensorFile(outputs[0], onnxlite.DecodeOptions{})
	require.NoError(t, err)
	wv, _ := want.Float64s()
	for k, w := range wv {
		assert.InDelta(t, w, *doc.Outputs[0].Data[k], 1e-12*math.Abs(w), "element %d", k)
	}
	code, _, errs := cli(t, "predict", "-model", model, "-input", inputs[0], "-precision", "float16")
	assert.Equal(t, exitUsage, code)
	assert.Contains(t, errs, "-precision \"float16\": expected float32 or float64")
}

// TestPredictEmptyTensors: predict feeds a .pb tensor as it is, empty or
// not: an axes input with no axes (reduce over every axis, or with
// noop_with_empty_axes over none) and data with no rows; the outputs
// against the ONNX backend test data (Debian libonnx-testdata 1.12.0).
// explain still wants samples.
func TestPredictEmptyTensors(t *testing.T) {
	for _, name := range []string{"node/test_reduce_sum_empty_axes_input_noop_random", "node/test_reduce_sum_default_axes_keepdims_random",
		"node/test_reshape_allowzero_reordered", "node/test_split_zero_size_splits"} {
		dir := caseDir(t, name)
		inputs, outputs := setFiles(t, dir)
		args := []string{"-model", filepath.Join(dir, "model.onnx")}
		for _, in := range inputs {
			args = append(args, "-input", in)
		}
		requireOutputs(t, predictJSON(t, args...), outputs)
	}
	dir := caseDir(t, "node/test_reshape_allowzero_reordered")
	inputs, _ := setFiles(t, dir)
	code, _, errs := cli(t, "explain", "-model", filepath.Join(dir, "model.onnx"), "-input", inputs[0], "-input", inputs[1])
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errs, "expected at least one sample, got a tensor of shape [0 3 4]")
}

// twoInputModel writes y = x·W + b + Σ_k E[ids_k] (x float (N, 3), ids
// int64 (N, 2) into a 5×4 table E), whose output t is linear in x: by
// Sundararajan et al. 2017 (eq. 1), integrated gradients from the zero
// baseline give x_i·W[i, t], whatever ids hold.
func twoInputModel(t *testing.T) (path string, w []float32) {
	t.Helper()
	w = []float32{0.5, -1, 2, 0.25, 1.5, 0.75, -0.5, 1, -2, 0.125, 1, -0.25}
	e := make([]float32, 20)
	for i := range e {
		e[i] = float32(i%7) - 3
	}
	f32t := func(name string, dims []int64, v []float32) *onnxlite.Tensor {
		return &onnxlite.Tensor{Name: name, DType: onnxlite.Float, Dims: dims, Data: v}
	}
	in := func(name string, dt onnxlite.DataType, d int64) *onnxlite.ValueInfo {
		return &onnxlite.ValueInfo{Name: name, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: dt, HasShape: true,
			Shape: []onnxlite.Dim{{Param: "N"}, {Value: d, HasValue: true}}}}
	}
	m := &onnxlite.Model{IRVersion: 8, Opsets: []onnxlite.OpsetImport{{Version: 13}}, ProducerName: "apportion-test",
		Graph: &onnxlite.Graph{
			Name:    "two_inputs",
			Inputs:  []*onnxlite.ValueInfo{in("x", onnxlite.Float, 3), in("ids", onnxlite.Int64, 2)},
			Outputs: []*onnxlite.ValueInfo{{Name: "y", Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Float}}},
			Initializers: []*onnxlite.Tensor{
				f32t("W", []int64{3, 4}, w), f32t("b", []int64{4}, []float32{0.1, 0.2, 0.3, 0.4}),
				f32t("E", []int64{5, 4}, e),
				{Name: "axes", DType: onnxlite.Int64, Dims: []int64{1}, Data: []int64{1}},
			},
			Nodes: []*onnxlite.Node{
				{Name: "dense", OpType: "Gemm", Inputs: []string{"x", "W", "b"}, Outputs: []string{"h"}},
				{Name: "embed", OpType: "Gather", Inputs: []string{"E", "ids"}, Outputs: []string{"e"}},
				{Name: "pool", OpType: "ReduceSum", Inputs: []string{"e", "axes"}, Outputs: []string{"s"},
					Attrs: []*onnxlite.Attribute{{Name: "keepdims", Type: onnxlite.AttrInt, I: 0}}},
				{Name: "sum", OpType: "Add", Inputs: []string{"h", "s"}, Outputs: []string{"y"}},
			},
		}}
	path = filepath.Join(t.TempDir(), "two_inputs.onnx")
	f, err := os.Create(path)
	require.NoError(t, err)
	require.NoError(t, onnxlite.Encode(f, m))
	require.NoError(t, f.Close())
	return path, w
}

// TestExplainHoldsOtherInputs explains a model of a float input and token
// ids: the attributions go to the float input, the ids held at each
// sample's values.
func TestExplainHoldsOtherInputs(t *testing.T) {
	model, w := twoInputModel(t)
	tmp := t.TempDir()
	x := []float64{1, 2, 3, 0.5, -1, 2}
	xs, ids := filepath.Join(tmp, "x.json"), filepath.Join(tmp, "ids.json")
	writeJSON(t, xs, []int{2, 3}, x)
	writeJSON(t, ids, []int{2, 2}, []float64{0, 4, 2, 2})
	for _, extra := range [][]string{nil, {"-input-name", "x"}} {
		args := append([]string{"explain", "-model", model, "-input", xs, "-input", ids, "-target", "1", "-steps", "8", "-format", "json"}, extra...)
		code, out, errs := cli(t, args...)
		require.Equal(t, exitOK, code, errs)
		var doc struct {
			Model        map[string]any `json:"model"`
			Explanations []struct {
				Attributions []float64 `json:"attributions"`
			} `json:"explanations"`
		}
		require.NoError(t, json.Unmarshal([]byte(out), &doc))
		assert.Equal(t, "x", doc.Model["input"])
		require.Len(t, doc.Explanations, 2)
		for s, e := range doc.Explanations {
			for i, a := range e.Attributions {
				// IG of a linear function: x_i·W[i, 1] (Sundararajan et al. 2017, eq. 1).
				assert.InDelta(t, x[s*3+i]*float64(w[i*4+1]), a, 1e-5, "sample %d feature %d", s, i)
			}
		}
	}
	code, _, errs := cli(t, "explain", "-model", model, "-input", xs, "-input", ids, "-input-name", "ids")
	assert.NotEqual(t, exitOK, code)
	assert.Contains(t, errs, `input "ids" holds INT64 values (token ids, indices), which have no gradient`)
	code, _, errs = cli(t, "explain", "-model", model, "-input", xs)
	assert.Equal(t, exitUsage, code)
	assert.Contains(t, errs, "the model has 2 inputs (x, ids): give one -input per input, in that order, got 1")
}

// TestInspectVerdict: inspect says what compile says, for a model that
// runs and explains, a text model of token ids, a model of a newer opset
// and one whose shape parameter is an input.
func TestInspectVerdict(t *testing.T) {
	inspect := func(model string) map[string]any {
		t.Helper()
		code, out, errs := cli(t, "inspect", "-model", model, "-format", "json")
		require.Equal(t, exitOK, code, errs)
		return decodeJSON(t, out)
	}
	reflect := filepath.Join("..", "..", "testdata", "reference", "digits_reflect_cnn.onnx")
	assert.Equal(t, "yes", inspect(reflect)["explainable"])

	text, _, _ := ortCase(t, "model", "text_embedding_conv1d_opset26")
	doc := inspect(text)
	assert.Equal(t, "indices", doc["inputs"].([]any)[0].(map[string]any)["use"])
	assert.Regexp(t, `^no: .*no floating-point input`, doc["explainable"])

	shape, _, _ := ortCase(t, "node", "reshape_runtime_shape_opset18")
	doc = inspect(shape)
	assert.Equal(t, "compile-time", doc["inputs"].([]any)[1].(map[string]any)["use"])
	assert.Regexp(t, `^not checked: input "shape" is read when the model is compiled`, doc["explainable"])
	code, out, _ := cli(t, "inspect", "-model", shape)
	require.Equal(t, exitOK, code)
	assert.Regexp(t, `(?m)^  shape\s+int64\s+\[2\]\s+read when compiling: a program per value$`, out)

	// The same reflect CNN declaring opset 27, one past ONNX Runtime 1.30's.
	m, err := onnxlite.DecodeFile(reflect, onnxlite.DecodeOptions{})
	require.NoError(t, err)
	m.Opsets = []onnxlite.OpsetImport{{Version: 27}}
	newer := filepath.Join(t.TempDir(), "newer.onnx")
	f, err := os.Create(newer)
	require.NoError(t, err)
	require.NoError(t, onnxlite.Encode(f, m))
	require.NoError(t, f.Close())
	assert.Equal(t, "no: not supported by apportion: the model imports ONNX opset 27, newer than 26, the newest apportion reads: re-export the model at opset 26", inspect(newer)["explainable"])
	code, out, _ = cli(t, "inspect", "-model", newer)
	require.Equal(t, exitOK, code)
	assert.Regexp(t, `(?m)^opset\s+27 \(newer than 26, the newest apportion reads\)$`, out)
}

// TestPredictInputsRequired: predict needs one -input per model input, and
// none for a model without inputs (ONNX backend test data, Debian
// libonnx-testdata 1.12.0: node/test_constant outputs its Constant).
func TestPredictInputsRequired(t *testing.T) {
	model, _ := twoInputModel(t)
	code, _, errs := cli(t, "predict", "-model", model)
	assert.Equal(t, exitUsage, code)
	assert.Contains(t, errs, "-input is required")

	dir := caseDir(t, "node/test_constant")
	_, outputs := onnxtestdata.SetFiles(filepath.Join(dir, "test_data_set_0"))
	requireOutputs(t, predictJSON(t, "-model", filepath.Join(dir, "model.onnx")), outputs)
}

// TestExplainSeveralInputsQuadrature: on a model of a float input and
// token ids, integrated gradients integrate by quadrature (the exact path
// integral and the gradient sums are not offered there), meet completeness
// with -steps auto, and -steps exact is a usage error that says why.
func TestExplainSeveralInputsQuadrature(t *testing.T) {
	model, f := severalInputsModel(t, false)
	tmp := t.TempDir()
	x := []float64{1, 2, 3, 0.5, -1, 2}
	ids := []float64{0, 4, 2, 2}
	xs, is := filepath.Join(tmp, "x.json"), filepath.Join(tmp, "ids.json")
	writeJSON(t, xs, []int{2, 3}, x)
	writeJSON(t, is, []int{2, 2}, ids)
	const target = 2
	doc, _ := explainJSONRun(t, exitOK, "-model", model, "-input", xs, "-input", is, "-target", "2", "-steps", "auto")
	require.Len(t, doc.Explanations, 2)
	for s, ex := range doc.Explanations {
		require.Nil(t, ex.Error)
		assert.False(t, ex.Exact)
		assert.Greater(t, ex.Points, 0)
		assert.Contains(t, ex.ExactSkipped, "not available for a model of several inputs")
		require.NotNil(t, ex.Completeness)
		assert.True(t, ex.Completeness.Judged)
		assert.True(t, ex.Completeness.OK, "relative gap %v", ex.Completeness.RelativeGap)
		// Completeness (Sundararajan et al. 2017, Proposition 1) against
		// the closed form: Σ a_i = F(x) − F(0), within the tolerance
		// (0.005) and binary32 rounding.
		id := ids[s*2 : s*2+2]
		want := f(x[s*3:s*3+3], id)[target] - f([]float64{0, 0, 0}, id)[target]
		assert.InDelta(t, want, sum(ex.Attributions), 0.005*math.Abs(want)+1e-5, "sample %d", s)
		assert.InDelta(t, f(x[s*3:s*3+3], id)[target], ex.Outputs[target], 1e-5, "sample %d", s)
	}

	code, out, errs := cli(t, "explain", "-model", model, "-input", xs, "-input", is, "-steps", "exact")
	assert.Equal(t, exitUsage, code)
	assert.Empty(t, out)
	assert.Contains(t, errs, "-steps exact: the exact path integral is not available for a model of several inputs (inputs: \"x\", \"ids\")")
}

// severalInputsModel writes y = softmax(relu(x·W + b) + Σ_k E[ids_k]) (x
// float (N, 3), ids int64 (N, 2) into a 5×4 table E) and returns the
// closed form in float64. With shape set the sum goes through a Reshape to
// a compile-time input "shape" first (given [-1, 4] it changes nothing).
func severalInputsModel(t *testing.T, shape bool) (string, func(x, ids []float64) []float64) {
	t.Helper()
	w := []float64{0.5, -1, 2, 0.25, 1.5, 0.75, -0.5, 1, -2, 0.125, 1, -0.25}
	bias := []float64{0.1, -0.2, 0.3, -0.4}
	e := make([]float64, 20)
	for i := range e {
		e[i] = (float64(i%7) - 3) / 4
	}
	f32t := func(name string, dims []int64, v []float64) *onnxlite.Tensor {
		f := make([]float32, len(v))
		for i, x := range v {
			f[i] = float32(x)
		}
		return &onnxlite.Tensor{Name: name, DType: onnxlite.Float, Dims: dims, Data: f}
	}
	in := func(name string, dt onnxlite.DataType, dims ...onnxlite.Dim) *onnxlite.ValueInfo {
		return &onnxlite.ValueInfo{Name: name, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: dt, HasShape: true, Shape: dims}}
	}
	batch, fixed := onnxlite.Dim{Param: "N"}, func(d int64) onnxlite.Dim { return onnxlite.Dim{Value: d, HasValue: true} }
	g := &onnxlite.Graph{
		Name:    "several_inputs",
		Inputs:  []*onnxlite.ValueInfo{in("x", onnxlite.Float, batch, fixed(3)), in("ids", onnxlite.Int64, batch, fixed(2))},
		Outputs: []*onnxlite.ValueInfo{{Name: "y", Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Float}}},
		Initializers: []*onnxlite.Tensor{
			f32t("W", []int64{3, 4}, w), f32t("b", []int64{4}, bias), f32t("E", []int64{5, 4}, e),
			{Name: "axes", DType: onnxlite.Int64, Dims: []int64{1}, Data: []int64{1}},
		},
		Nodes: []*onnxlite.Node{
			{Name: "dense", OpType: "Gemm", Inputs: []string{"x", "W", "b"}, Outputs: []string{"h"}},
			{Name: "act", OpType: "Relu", Inputs: []string{"h"}, Outputs: []string{"r"}},
			{Name: "embed", OpType: "Gather", Inputs: []string{"E", "ids"}, Outputs: []string{"g"}},
			{Name: "pool", OpType: "ReduceSum", Inputs: []string{"g", "axes"}, Outputs: []string{"s"},
				Attrs: []*onnxlite.Attribute{{Name: "keepdims", Type: onnxlite.AttrInt, I: 0}}},
			{Name: "sum", OpType: "Add", Inputs: []string{"r", "s"}, Outputs: []string{"z"}},
		},
	}
	last := "z"
	if shape {
		g.Inputs = append(g.Inputs, in("shape", onnxlite.Int64, fixed(2)))
		g.Nodes = append(g.Nodes, &onnxlite.Node{Name: "reshape", OpType: "Reshape", Inputs: []string{"z", "shape"}, Outputs: []string{"l"}})
		last = "l"
	}
	g.Nodes = append(g.Nodes, &onnxlite.Node{Name: "prob", OpType: "Softmax", Inputs: []string{last}, Outputs: []string{"y"}})
	m := &onnxlite.Model{IRVersion: 8, Opsets: []onnxlite.OpsetImport{{Version: 13}}, ProducerName: "apportion-test", Graph: g}
	path := filepath.Join(t.TempDir(), "several_inputs.onnx")
	f, err := os.Create(path)
	require.NoError(t, err)
	require.NoError(t, onnxlite.Encode(f, m))
	require.NoError(t, f.Close())
	return path, func(x, ids []float64) []float64 {
		z := make([]float64, 4)
		total := 0.0
		for j := range z {
			h := bias[j]
			for i := range 3 {
				h += x[i] * w[i*4+j]
			}
			z[j] = max(h, 0)
			for _, id := range ids {
				z[j] += e[int(id)*4+j]
			}
			z[j] = math.Exp(z[j])
			total += z[j]
		}
		for j := range z {
			z[j] /= total
		}
		return z
	}
}
