package gradattr_test

import (
	"bytes"
	"context"
	"encoding/json"
	"math"
	"os/exec"
	"slices"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/debpython"
	"github.com/apportion/apportion/nn"
)

// torchShapley evaluates the pumps model's ONNX graph (Sub, Div, Gemm,
// Relu, Softmax) in float64 PyTorch and computes exact interventional
// Shapley values from their definition (Shapley 1953; Lundberg & Lee 2017
// for v(S) = mean_r f(x_S, r_S̄)) over every coalition.
const torchShapley = `
import json, math, sys
import onnx, onnx.numpy_helper, torch
m = onnx.load(sys.argv[1])
req = json.load(sys.stdin)
inits = {t.name: torch.from_numpy(onnx.numpy_helper.to_array(t).astype("float64")) for t in m.graph.initializer}
def forward(x):
    vals = {m.graph.input[0].name: x}
    for n in m.graph.node:
        a = [vals[i] if i in vals else inits[i] for i in n.input]
        at = {x.name: onnx.helper.get_attribute_value(x) for x in n.attribute}
        if n.op_type == "Sub": y = a[0] - a[1]
        elif n.op_type == "Div": y = a[0] / a[1]
        elif n.op_type == "Gemm":
            A = a[0].T if at.get("transA", 0) else a[0]
            B = a[1].T if at.get("transB", 0) else a[1]
            y = at.get("alpha", 1.0) * (A @ B) + at.get("beta", 1.0) * a[2]
        elif n.op_type == "Relu": y = torch.relu(a[0])
        elif n.op_type == "Softmax": y = torch.softmax(a[0], dim=at.get("axis", -1))
        else: raise ValueError(n.op_type)
        vals[n.output[0]] = y
    return vals[m.graph.output[0].name]
x = torch.tensor(req["x"], dtype=torch.float64)
ref = torch.tensor(req["ref"], dtype=torch.float64)
k, d = req["target"], x.shape[0]
v = []
for mask in range(1 << d):
    rows = ref.clone()
    for i in range(d):
        if mask >> i & 1:
            rows[:, i] = x[i]
    v.append(forward(rows)[:, k].mean().item())
phi = [0.0] * d
for i in range(d):
    for mask in range(1 << d):
        if mask >> i & 1: continue
        s = bin(mask).count("1")
        phi[i] += math.factorial(s) * math.factorial(d - s - 1) / math.factorial(d) * (v[mask | 1 << i] - v[mask])
json.dump({"phi": phi, "empty": v[0], "full": v[-1]}, sys.stdout)
`

func TestShapleyPumpsAgainstTorch(t *testing.T) {
	// Exact Shapley values of the pumps demo's prediction over its 200
	// reference rows (all of them: K = 200), on both engines, against the
	// same enumeration in float64 PyTorch (Debian python3-torch 1.13.1):
	// within 1e-12 on the float64 engine, 2e-6 on float32.
	python := debpython.Require(t, "onnx", "torch")
	d := loadDemo(t)["demo/pumps"]
	ref := demoReference(t, "pumps")
	require.Len(t, ref, 200)
	got := map[nn.DType]*gradattr.Result{}
	for _, dt := range []nn.DType{nn.Float64, nn.Float32} {
		r, err := gradattr.Shapley(context.Background(), d.head(dt), d.x, gradattr.TargetTop,
			gradattr.ShapleyOptions{Reference: ref, ReferenceRows: 200, Estimator: gradattr.EstimatorExact})
		require.NoError(t, err)
		assert.Equal(t, 254*200+200+1, r.Cost.ForwardPasses) // 2^8 − 2 coalitions of 200 rows, v(∅), f(x)
		assert.True(t, r.Completeness.OK, "efficiency, %v", dt)
		got[dt] = r
	}
	req, err := json.Marshal(map[string]any{"x": d.x, "ref": ref, "target": got[nn.Float64].Target})
	require.NoError(t, err)
	cmd := exec.Command(python, "-c", torchShapley, "../demo/data/pumps.onnx")
	cmd.Stdin = bytes.NewReader(req)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	out, err := cmd.Output()
	require.NoError(t, err, stderr.String())
	var want struct {
		Phi         []float64 `json:"phi"`
		Empty, Full float64
	}
	require.NoError(t, json.Unmarshal(out, &want))
	for dt, tol := range map[nn.DType]float64{nn.Float64: 1e-12, nn.Float32: 2e-6} {
		r := got[dt]
		assert.InDeltaSlice(t, want.Phi, r.Attributions, tol, "%v", dt)
		assert.InDelta(t, want.Empty, r.BaselineOutput, tol, "%v", dt)
		assert.InDelta(t, want.Full, r.Output, tol, "%v", dt)
	}
	t.Logf("φ (float64 engine) %.4f; torch %.4f", got[nn.Float64].Attributions, want.Phi)
}

func TestOcclusionWeldsAgainstLoop(t *testing.T) {
	// Occlusion of a welds patch through the compiled model in batches
	// against the definition (Zeiler & Fergus 2014, §4.2) run window by
	// window, one Forward per occluded patch: a 4×4 window by 2 set to the
	// mean clean patch, each pixel the mean drop over its windows.
	h := weldsHead(t)
	patches, _ := readNPY[float32](t, "welds_test_patches.npy")
	x := make([]float64, 1024)
	for i := range x {
		x[i] = float64(patches[1024+i]) // held-out patch 1, defective
	}
	ref := demoReference(t, "welds")
	mean := make([]float64, 1024)
	for _, r := range ref {
		for i, v := range r {
			mean[i] += v / float64(len(ref))
		}
	}
	ctx := context.Background()
	res, err := gradattr.Occlusion(ctx, h, x, gradattr.TargetTop, gradattr.OcclusionOptions{
		Baselines: []gradattr.Baseline{{Kind: gradattr.BaselineValues, Values: mean}}})
	require.NoError(t, err)
	fx, err := h.Forward(ctx, x, 1)
	require.NoError(t, err)
	k := res.Target
	sum, count := make([]float64, 1024), make([]float64, 1024)
	for y0 := 0; y0+4 <= 32; y0 += 2 {
		for x0 := 0; x0+4 <= 32; x0 += 2 {
			p := slices.Clone(x)
			for y := y0; y < y0+4; y++ {
				for xx := x0; xx < x0+4; xx++ {
					p[y*32+xx] = mean[y*32+xx]
				}
			}
			out, err := h.Forward(ctx, p, 1)
			require.NoError(t, err)
			for y := y0; y < y0+4; y++ {
				for xx := x0; xx < x0+4; xx++ {
					sum[y*32+xx] += fx[k] - out[k]
					count[y*32+xx]++
				}
			}
		}
	}
	for i := range sum {
		sum[i] /= count[i]
	}
	assert.InDeltaSlice(t, sum, res.Attributions, 1e-12)
	assert.Equal(t, 1+1+15*15, res.Cost.ForwardPasses)
}

func TestShapleyWeldsSuperpixels(t *testing.T) {
	// Shapley values of about 64 SLIC segments of a welds patch by the
	// regression estimator: efficiency holds to rounding (the constraint
	// of Lundberg & Lee 2017, Theorem 2), each segment's value is spread
	// over its pixels, and the standard errors are finite and positive.
	h := weldsHead(t)
	patches, _ := readNPY[float32](t, "welds_test_patches.npy")
	x := make([]float64, 1024)
	for i := range x {
		x[i] = float64(patches[1024+i])
	}
	ref := demoReference(t, "welds")
	r, err := gradattr.Attribute(context.Background(), h, x, gradattr.TargetTop, gradattr.Options{
		Method: gradattr.MethodShapley, Reference: ref, ReferenceRows: 8, Coalitions: 512, Superpixels: 64})
	require.NoError(t, err)
	assert.Equal(t, string(gradattr.EstimatorRegression), r.Settings.Estimator)
	g := r.Groups
	require.NotNil(t, g)
	assert.InDelta(t, 64, len(g.Names), 0.2*64)
	assert.True(t, r.Completeness.OK)
	assert.True(t, g.Completeness.OK)
	assert.Equal(t, 1+8+512*8, r.Cost.ForwardPasses)
	for s, name := range g.Names {
		assert.Greater(t, g.StandardErrors[s], 0.0, name)
		n := 0
		for _, l := range g.Segments {
			if l == s {
				n++
			}
		}
		for p, l := range g.Segments {
			if l == s {
				assert.InDelta(t, g.Attributions[s]/float64(n), r.Attributions[p], 1e-15)
				assert.InDelta(t, g.StandardErrors[s]/float64(n), r.StandardErrors[p], 1e-15)
			}
		}
	}
	assert.False(t, math.IsNaN(r.Completeness.Sum))
}
