package main

import (
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"testing"

	"codeberg.org/sbinet/npyio/npz"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/testfiles"
)

// digitsLayerFixture reads arrays of testdata/reference/digits_cnn_layer.npz:
// float64 torch.autograd with forward hooks (python3-torch 1.13.1), see
// testdata/reference/README.md.
func digitsLayerFixture(t *testing.T, names ...string) [][]float64 {
	t.Helper()
	z, err := npz.Open("../../testdata/reference/digits_cnn_layer.npz")
	require.NoError(t, err)
	defer z.Close()
	out := make([][]float64, len(names))
	for i, n := range names {
		require.NoError(t, z.Read(n+".npy", &out[i]), n)
	}
	return out
}

const digitsModel = "../../testdata/reference/digits_cnn.onnx"

func TestExplainLayerJSONContract(t *testing.T) {
	fx := digitsLayerFixture(t, "x", "out", "ig_zero_input", "ig_zero_input_base_out", "ig_zero_value")
	x, out, want := fx[0], fx[1], fx[2]
	rows := 3
	input := filepath.Join(t.TempDir(), "digits.json")
	testfiles.WriteJSON(t, input, []int{rows, 1, 8, 8}, x[:rows*64])
	doc, _ := explainJSONRun(t, 0, "-model", digitsModel, "-input", input, "-method", "ig",
		"-layer", "/conv/Conv_output_0", "-steps", "auto", "-tolerance", "0.001")
	assert.Equal(t, "/conv/Conv_output_0", doc.Settings["layer"])
	require.Len(t, doc.Explanations, rows)
	for r, e := range doc.Explanations {
		require.Nil(t, e.Error)
		assert.Equal(t, []int{8, 8, 8}, e.Shape, "V's per-sample shape")
		require.Len(t, e.Attributions, 512)
		// The exact integral by float64 torch.autograd at the hooked value,
		// from V of the zero input (float32 engine here).
		assert.LessOrEqual(t, relL1(e.Attributions, want[r*512:(r+1)*512]), 0.005, "row %d", r)
		// completeness at the layer: f(x) − g(V(0)), both by float64 torch
		assert.InDelta(t, out[r*10+*e.Target]-fx[3][r], e.Completeness.Expected, 1e-5, "row %d", r)
		assert.True(t, e.Completeness.OK)
	}

	// From V = 0.
	doc, _ = explainJSONRun(t, 0, "-model", digitsModel, "-input", input, "-layer", "/conv/Conv_output_0",
		"-layer-baseline", "zero", "-tolerance", "0.001")
	assert.Equal(t, "zero", doc.Settings["layer_baseline"])
	for r, e := range doc.Explanations {
		// float64 torch.autograd, the exact integral from V′ = 0
		assert.LessOrEqual(t, relL1(e.Attributions, fx[4][r*512:(r+1)*512]), 0.005, "row %d", r)
	}
}

func TestExplainGradCAMJSONContract(t *testing.T) {
	fx := digitsLayerFixture(t, "x", "gradcam_map")
	input := filepath.Join(t.TempDir(), "digits.json")
	testfiles.WriteJSON(t, input, []int{10, 1, 8, 8}, fx[0])
	for _, layer := range []string{"", "/pool/MaxPool_output_0"} {
		args := []string{"-model", digitsModel, "-input", input, "-method", "grad-cam", "-target", "top"}
		if layer != "" {
			args = append(args, "-layer", layer)
		}
		doc, _ := explainJSONRun(t, 0, args...)
		// The default is the last value with spatial axes before the
		// classifier: the pooling output, which the fixture's Grad-CAM reads.
		assert.Equal(t, "/pool/MaxPool_output_0", doc.Settings["layer"])
		assert.Equal(t, true, doc.Settings["logits"], "y is the logit, the Softmax's input (Selvaraju et al. 2017)")
		for r, e := range doc.Explanations {
			assert.Equal(t, []int{4, 4}, e.Shape)
			// Selvaraju et al. 2017, eq. 1–2, by float64 torch.autograd with a hook
			assert.InDeltaSlice(t, fx[1][r*16:(r+1)*16], e.Attributions, 1e-5, "row %d", r)
			assert.Nil(t, e.Completeness)
		}
	}
}

func TestExplainLayerErrors(t *testing.T) {
	input := filepath.Join(t.TempDir(), "digits.json")
	testfiles.WriteJSON(t, input, []int{1, 1, 8, 8}, make([]float64, 64))
	for _, tc := range []struct {
		args []string
		code int
		msg  string
	}{
		{[]string{"-layer", "/nope"}, 2, `-layer "/nope": the model has no such value (inspect -values lists the values)`},
		{[]string{"-layer", "x"}, 2, "it is the model's input"},
		{[]string{"-layer-baseline", "zero"}, 2, "-layer-baseline applies with -layer to a method with a baseline"},
		{[]string{"-layer", "/conv/Conv_output_0", "-layer-baseline", "mean"}, 2, "-layer-baseline must be input or zero"},
		{[]string{"-method", "grad-cam", "-layer", "/fc/Gemm_output_0"}, 2, "grad-cam reads a value with a channel axis and spatial axes"},
	} {
		code, _, errs := cli(t, append([]string{"explain", "-model", digitsModel, "-input", input}, tc.args...)...)
		assert.Equal(t, tc.code, code, "%v: %s", tc.args, errs)
		assert.Contains(t, errs, tc.msg, tc.args)
	}
}

func TestInspectValues(t *testing.T) {
	code, out, errs := cli(t, "inspect", "-model", digitsModel, "-values", "-format", "json")
	require.Equal(t, 0, code, errs)
	var d struct {
		Values []struct {
			Name  string `json:"name"`
			Op    string `json:"op"`
			Type  string `json:"type"`
			Shape []int  `json:"shape"`
		} `json:"values"`
	}
	require.NoError(t, json.Unmarshal([]byte(out), &d))
	require.Len(t, d.Values, 6)
	// The names and shapes the exporter gave the values (python3-onnx 1.12.0
	// read them into testdata/reference/manifest.json's "layers").
	assert.Equal(t, "/conv/Conv_output_0", d.Values[0].Name)
	assert.Equal(t, "Conv", d.Values[0].Op)
	assert.Equal(t, []int{8, 8, 8}, d.Values[0].Shape)
	assert.Equal(t, "/pool/MaxPool_output_0", d.Values[2].Name)
	assert.Equal(t, []int{8, 4, 4}, d.Values[2].Shape)

	code, out, _ = cli(t, "inspect", "-model", digitsModel)
	require.Equal(t, 0, code)
	assert.NotContains(t, out, "values", "only with -values")
	code, out, _ = cli(t, "inspect", "-model", digitsModel, "-values")
	require.Equal(t, 0, code)
	assert.Contains(t, out, "/pool/MaxPool_output_0  MaxPool  float32  [8 4 4]")
}

func TestExplainGradCAMPNG(t *testing.T) {
	out := filepath.Join(t.TempDir(), "cam.png")
	code, _, errs := cli(t, "explain", "-demo", "welds", "-method", "grad-cam", "-format", "png", "-out", out)
	require.Equal(t, 0, code, errs)
	b, err := os.ReadFile(out)
	require.NoError(t, err)
	assert.Equal(t, "\x89PNG", string(b[:4]), "PNG signature (PNG specification, §5.2)")
}

// relL1 is Σ|got − want| / Σ|want|.
func relL1(got, want []float64) float64 {
	var num, den float64
	for i := range want {
		num += math.Abs(got[i] - want[i])
		den += math.Abs(want[i])
	}
	return num / den
}
