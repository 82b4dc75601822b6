package gradattr_test

import (
	"bytes"
	"context"
	"encoding/json"
	"os/exec"
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
