package main

import (
	"encoding/json"
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/heldshape"
	"github.com/apportion/apportion/onnxlite"
)

// heldShapeModel writes internal/heldshape's network, whose target shape
// is a compile-time input, in float32, and returns its closed form.
func heldShapeModel(t *testing.T, dir string) (path string, f func(x []float64) []float64) {
	t.Helper()
	path = filepath.Join(dir, "held.onnx")
	out, err := os.Create(path)
	require.NoError(t, err)
	require.NoError(t, onnxlite.Encode(out, heldshape.Model(onnxlite.Float)))
	require.NoError(t, out.Close())
	return path, heldshape.F
}

func TestExplainHeldShapeInput(t *testing.T) {
	// The shape file is the compile-time input's value, the same for every
	// sample, read whole; the output's size follows from it, so -target is
	// checked per sample. The attributions meet completeness against the
	// closed form's f(x) − f(0) (Sundararajan et al. 2017, §3).
	dir := t.TempDir()
	model, f := heldShapeModel(t, dir)
	xs := [][]float64{{1, 2, 3}, {0.5, -1, 2}}
	raw, _ := json.Marshal(xs)
	input := writeTemp(t, "x.json", string(raw))
	shape := writeTemp(t, "shape.json", "[-1, 4]")
	code, out, errOut := cli(t, "explain", "-model", model, "-input", input, "-input", shape, "-target", "1", "-format", "json")
	require.Equal(t, exitOK, code, errOut)
	var doc struct {
		Explanations []struct {
			Target       int       `json:"target"`
			Outputs      []float64 `json:"outputs"`
			Attributions []float64 `json:"attributions"`
			Completeness struct {
				Expected float64 `json:"expected"`
				OK       bool    `json:"ok"`
			} `json:"completeness"`
		} `json:"explanations"`
	}
	require.NoError(t, json.Unmarshal([]byte(out), &doc), out)
	require.Len(t, doc.Explanations, 2)
	for i, e := range doc.Explanations {
		assert.Equal(t, 1, e.Target)
		assert.InDeltaSlice(t, f(xs[i]), e.Outputs, 1e-6, "sample %d: closed form", i)
		assert.InDelta(t, f(xs[i])[1]-f([]float64{0, 0, 0})[1], e.Completeness.Expected, 1e-6)
		assert.True(t, e.Completeness.OK, "sample %d", i)
	}

	code, out, _ = cli(t, "explain", "-model", model, "-input", input, "-input", shape, "-target", "7")
	assert.Equal(t, exitFail, code)
	assert.Contains(t, out, `sample 0: error: target must be top or an index from 0 to 3 (output "y" has 4 values with this sample's inputs), got 7`)
}
