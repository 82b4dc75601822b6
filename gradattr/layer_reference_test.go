package gradattr_test

import (
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"slices"
	"testing"

	"codeberg.org/sbinet/npyio/npz"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// layerReference is an entry of manifest.json's "layers" whose model the
// manifest lists among those apportion runs.
type layerReference struct {
	ONNX         string `json:"onnx"`
	Fixture      string `json:"fixture"`
	Value        string `json:"value"`
	GradCAMValue string `json:"gradcam_value"`
}

func layerReferences(t *testing.T) []layerReference {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(referenceDir, "manifest.json"))
	require.NoError(t, err)
	var man struct {
		Models []referenceModel `json:"models"`
		Layers []layerReference `json:"layers"`
	}
	require.NoError(t, json.Unmarshal(b, &man))
	var out []layerReference
	for _, l := range man.Layers {
		if slices.ContainsFunc(man.Models, func(m referenceModel) bool { return m.ONNX == l.ONNX }) {
			out = append(out, l)
		}
	}
	require.NotEmpty(t, out)
	return out
}

// TestReferenceLayerIntegratedGradients runs automatic integrated
// gradients at an intermediate value V (float64 engine), from V of the
// zero input and from V = 0, against float64 torch.autograd with a
// forward hook (the layer fixtures of testdata/reference).
func TestReferenceLayerIntegratedGradients(t *testing.T) {
	ctx := context.Background()
	for _, lr := range layerReferences(t) {
		t.Run(lr.ONNX, func(t *testing.T) {
			z, err := npz.Open(filepath.Join(referenceDir, lr.Fixture))
			require.NoError(t, err)
			defer z.Close()
			read := func(name string) []float64 {
				var v []float64
				require.NoError(t, z.Read(name+".npy", &v), name)
				return v
			}
			var tg []int64
			require.NoError(t, z.Read("target.npy", &tg))
			model, err := onnxlite.DecodeFile(filepath.Join(referenceDir, lr.ONNX), onnxlite.DecodeOptions{})
			require.NoError(t, err)
			nw, err := nn.Compile(model, nn.Options{DType: nn.Float64})
			require.NoError(t, err)
			l, err := nw.Layer(lr.Value, nn.Selection{})
			require.NoError(t, err)
			x, grad := read("x"), read("grad")
			rows := len(tg)
			features, size := len(x)/rows, len(grad)/rows
			v0, err := l.Values(ctx, make([]float64, features), 1)
			require.NoError(t, err)
			// V of the zero input, by the torch forward hook
			assert.LessOrEqual(t, relL1(v0, read("value_zero_input")), 1e-12)
			for _, tc := range []struct {
				name     string
				baseline []float64
			}{{"zero_input", v0}, {"zero_value", make([]float64, size)}} {
				want, wantBase, worst := read("ig_"+tc.name), read("ig_"+tc.name+"_base_out"), 0.0
				for r := range rows {
					h, v, err := l.At(ctx, row(x, r, features))
					require.NoError(t, err)
					g, err := gradattr.Gradient(ctx, h, v, int(tg[r]), gradattr.GradientOptions{})
					require.NoError(t, err)
					// ∂F[target]/∂V by float64 torch.autograd at the hooked leaf
					assert.LessOrEqual(t, relL1(g.Attributions, row(grad, r, size)), 1e-9, "row %d layer gradient", r)
					res, err := gradattr.IntegratedGradients(ctx, h, v, int(tg[r]), gradattr.IGOptions{Tolerance: 1e-4,
						Baselines: []gradattr.Baseline{{Kind: gradattr.BaselineValues, Values: tc.baseline}}})
					require.NoError(t, err)
					// Completeness at the layer: Σ IG = g(V) − g(V′) (Sundararajan et al. 2017,
					// Prop. 1). The Relu and max-pool kinks on the path keep the
					// trapezoid rule's gap near 1e-4 at its 4097-point cap.
					assert.LessOrEqual(t, res.Completeness.RelativeGap, 1e-3, "row %d", r)
					e := relL1(res.Attributions, row(want, r, size))
					// Exact integral (2^15-point midpoint sum) by float64 torch.autograd, as for the inputs
					assert.LessOrEqual(t, e, 0.005, "%s, row %d: %d points", tc.name, r, res.Settings.Points)
					// g(V′) by float64 torch (python3-torch 1.13.1)
					assert.LessOrEqual(t, relDiff(res.BaselineOutput, wantBase[r]), 1e-9, "%s baseline output, row %d", tc.name, r)
					worst = max(worst, e)
				}
				t.Logf("%s: worst relative L1 %.2e", tc.name, worst)
			}
			if lr.GradCAMValue == "" {
				return
			}
			// Grad-CAM of the target's logit (the Softmax input, the paper's y).
			l, err = nw.Layer(lr.GradCAMValue, nn.Selection{Logits: true})
			require.NoError(t, err)
			want := read("gradcam_map")
			width := len(want) / rows
			for r := range rows {
				h, a, err := l.At(ctx, row(x, r, features))
				require.NoError(t, err)
				res, err := gradattr.GradCAM(ctx, h, a, int(tg[r]))
				require.NoError(t, err)
				require.Equal(t, []int{4, 4}, res.Shape)
				// Selvaraju et al. 2017, eq. 1–2, by float64 torch.autograd with a hook
				assert.InDeltaSlice(t, row(want, r, width), res.Attributions, 1e-12, "row %d map", r)
			}
		})
	}
}
