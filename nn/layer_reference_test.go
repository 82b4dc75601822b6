package nn_test

import (
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// layerFixture is an entry of manifest.json's "layers".
type layerFixture struct {
	Fixture      string `json:"fixture"`
	Value        string `json:"value"`
	ValueShape   []int  `json:"value_shape"`
	ONNX         string `json:"onnx"`
	Producer     string `json:"producer"`
	GradCAMValue string `json:"gradcam_value"`
	GradCAMShape []int  `json:"gradcam_value_shape"`
}

// runnableLayerFixtures returns the layer fixtures of the models the
// manifest lists as run by apportion, with the files of each model's
// export variants (the digits CNN's _view and _batch1 files share its
// value names).
func runnableLayerFixtures(t *testing.T) map[string]layerFixture {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(referenceDir, "manifest.json"))
	require.NoError(t, err)
	var m struct {
		Models []struct {
			ONNX    string `json:"onnx"`
			Fixture string `json:"fixture"`
		} `json:"models"`
		Layers []layerFixture `json:"layers"`
	}
	require.NoError(t, json.Unmarshal(b, &m))
	out := map[string]layerFixture{}
	for _, l := range m.Layers {
		base := strings.TrimSuffix(l.ONNX, ".onnx")
		for _, mm := range m.Models {
			if mm.ONNX == l.ONNX || strings.HasPrefix(mm.ONNX, base+"_") && mm.Fixture == base+".npz" {
				out[mm.ONNX] = l
			}
		}
	}
	return out
}

// TestReferenceLayer compares V(x), F through the rest of the graph and
// ∂F[target]/∂V at an intermediate value with float64 torch.autograd with
// forward hooks (python3-torch 1.13.1, testdata/reference/generate.py).
func TestReferenceLayer(t *testing.T) {
	fixtures := runnableLayerFixtures(t)
	require.Contains(t, fixtures, "digits_cnn.onnx")
	for file, lf := range fixtures {
		t.Run(file, func(t *testing.T) {
			fx := openReference(t, lf.Fixture)
			x, wantOut, wantV, wantGrad := fx.f64("x"), fx.f64("out"), fx.f64("value"), fx.f64("grad")
			target := fx.ints("target")
			rows, size := len(target), len(wantV)/len(target)
			model, err := onnxlite.DecodeFile(filepath.Join(referenceDir, file), onnxlite.DecodeOptions{})
			require.NoError(t, err)
			for _, tc := range []struct {
				dt       nn.DType
				tol, gtl float64
			}{
				// float32 rounding of a few layers (common practice), as in
				// TestReferenceTorch
				{nn.Float32, 1e-5, 1e-4},
				{nn.Float64, 1e-9, 1e-9},
			} {
				t.Run(tc.dt.String(), func(t *testing.T) {
					ctx := context.Background()
					nw, err := nn.Compile(model, nn.Options{DType: tc.dt})
					require.NoError(t, err)
					l, err := nw.Layer(lf.Value, nn.Selection{})
					require.NoError(t, err)
					// value_shape and producer recorded by generate.py from the export
					require.Equal(t, lf.ValueShape, l.InputShape())
					assert.True(t, strings.HasPrefix(lf.Producer, l.Op()), "producer %s", l.Op())
					assert.Empty(t, l.Fixed())
					v, err := l.Values(ctx, x, rows)
					require.NoError(t, err)
					// float64 torch forward hook on the module that outputs V
					assert.LessOrEqual(t, relMax(v, wantV), tc.tol, "V")
					for r := range rows {
						h, vr, err := l.At(ctx, x[r*len(x)/rows:(r+1)*len(x)/rows])
						require.NoError(t, err)
						assert.Equal(t, v[r*size:(r+1)*size], vr, "row %d: V alone and in a batch", r)
						out, g, err := h.Gradient(ctx, vr, 1, target[r:r+1])
						require.NoError(t, err)
						o := wantOut[r*len(out) : (r+1)*len(out)]
						// float64 torch.autograd at the leaf the hook substitutes for V
						assert.LessOrEqual(t, relMax(out, o), tc.tol, "row %d F through g", r)
						assert.LessOrEqual(t, relL1(g, wantGrad[r*size:(r+1)*size]), tc.gtl, "row %d ∂F/∂V", r)
					}
					if lf.GradCAMValue == "" {
						return
					}
					l, err = nw.Layer(lf.GradCAMValue, nn.Selection{})
					require.NoError(t, err)
					require.Equal(t, lf.GradCAMShape, l.InputShape())
					a, err := l.Values(ctx, x, rows)
					require.NoError(t, err)
					// float64 torch forward hook on the pooling module
					assert.LessOrEqual(t, relMax(a, fx.f64("gradcam_value")), tc.tol, "Grad-CAM's A")
				})
			}
		})
	}
}

// TestLayerValuesOfExportedModel lists the digits CNN's values with the
// names the exporter gave them (python3-onnx 1.12.0 read the same node
// order into manifest.json).
func TestLayerValuesOfExportedModel(t *testing.T) {
	model, err := onnxlite.DecodeFile(filepath.Join(referenceDir, "digits_cnn.onnx"), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	nw, err := nn.Compile(model, nn.Options{})
	require.NoError(t, err)
	vals, err := nw.Values()
	require.NoError(t, err)
	var ops []string
	i := slices.IndexFunc(vals, func(v nn.Value) bool { return v.Name == "/conv/Conv_output_0" })
	require.GreaterOrEqual(t, i, 0)
	assert.Equal(t, []int{8, 8, 8}, vals[i].Shape)
	for _, v := range vals {
		ops = append(ops, v.Op)
	}
	assert.Equal(t, []string{"Conv", "Relu", "MaxPool", "Flatten", "Gemm", "Softmax"}, ops)
}
