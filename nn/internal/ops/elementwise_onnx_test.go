package ops

import (
	"fmt"
	"math"
	"sort"
	"strings"
	"testing"

	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/onnxlite"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// elemONNXOps are the ONNX operators the kernels of this package implement
// directly, with the number of data inputs that become graph nodes (the
// other inputs — Pow's exponent, Clip's bounds, ReduceSum's axes — are
// constants the compiler reads).
var elemONNXOps = map[string]int{
	"Relu": 1, "LeakyRelu": 1, "Elu": 1, "Selu": 1, "Celu": 1, "Sigmoid": 1, "HardSigmoid": 1,
	"HardSwish": 1, "Tanh": 1, "Softplus": 1, "Softsign": 1, "Erf": 1, "Abs": 1, "Sqrt": 1,
	"Exp": 1, "Log": 1, "Neg": 1, "Pow": 1, "Identity": 1, "Clip": 1,
	"Add": 2, "Sub": 2, "Mul": 2, "Div": 2, "PRelu": 2,
	"Softmax": 1, "LogSoftmax": 1, "ReduceSum": 1, "ReduceMean": 1,
}

// elemONNXPrefixes select the backend cases worth decoding.
var elemONNXPrefixes = []string{
	"test_relu", "test_leakyrelu", "test_elu", "test_selu", "test_celu", "test_sigmoid",
	"test_hardsigmoid", "test_hardswish", "test_tanh", "test_softplus", "test_softsign", "test_erf",
	"test_abs", "test_sqrt", "test_exp", "test_log", "test_neg", "test_pow", "test_identity",
	"test_clip", "test_add", "test_sub", "test_mul", "test_div", "test_prelu", "test_softmax",
	"test_logsoftmax", "test_reduce_sum", "test_reduce_mean",
}

// elemSkip is a backend case outside what these kernels take; the reason is
// logged and counted.
type elemSkip string

func (s elemSkip) Error() string { return string(s) }

// elemFromONNX builds node n of a single-node backend model over the data
// inputs xs; consts holds every input tensor of the test data set by value
// name.
func elemFromONNX(n *onnxlite.Node, opset int64, xs []*G.Node, consts map[string]*onnxlite.Tensor) (*G.Node, error) {
	constIn := func(i int) *onnxlite.Tensor {
		if i < len(n.Inputs) && n.Inputs[i] != "" {
			return consts[n.Inputs[i]]
		}
		return nil
	}
	f := func(name string, def float64) float64 { return float64(n.AttrFloat(name, float32(def))) }
	switch op := n.OpType; op {
	case "Relu", "Sigmoid", "HardSwish", "Tanh", "Softplus", "Softsign", "Erf", "Abs", "Sqrt", "Exp", "Log", "Neg", "Identity":
		return Unary(xs[0], op, 0, 0)
	case "LeakyRelu": // ONNX LeakyRelu-16: alpha defaults to 0.01
		return Unary(xs[0], op, f("alpha", 0.01), 0)
	case "Elu", "Celu": // ONNX Elu-6, Celu-12: alpha defaults to 1
		return Unary(xs[0], op, f("alpha", 1), 0)
	case "Selu": // ONNX Selu-6 defaults
		return Unary(xs[0], op, f("alpha", seluAlpha), f("gamma", seluGamma))
	case "HardSigmoid": // ONNX HardSigmoid-6: alpha 0.2, beta 0.5
		return Unary(xs[0], op, f("alpha", 0.2), f("beta", 0.5))
	case "Pow":
		// A one-element exponent goes through unary; any other through
		// Binary, which needs it in the base's element type.
		e := constIn(1)
		if v, err := e.Float64s(); err == nil && len(v) == 1 {
			return Unary(xs[0], op, v[0], 0)
		}
		if e.DType != onnxlite.Float && e.DType != onnxlite.Double {
			return nil, elemSkip(fmt.Sprintf("exponent is %v: the kernels take float and double", e.DType))
		}
		return Binary(xs[0], xs[1], op)
	case "Clip":
		lo, hi := math.Inf(-1), math.Inf(1)
		if opset < 11 {
			lo, hi = f("min", lo), f("max", hi)
		} else {
			for i, p := range []*float64{&lo, &hi} {
				if c := constIn(i + 1); c != nil {
					v, err := c.Float64s()
					if err != nil || len(v) != 1 {
						return nil, fmt.Errorf("Clip bound %d: %v %v", i+1, v, err)
					}
					*p = v[0]
				}
			}
		}
		return Clip(xs[0], lo, hi)
	case "Add", "Sub", "Mul", "Div", "PRelu":
		return Binary(xs[0], xs[1], op)
	case "Softmax", "LogSoftmax":
		if opset < 13 {
			return nil, elemSkip("opset < 13 coerces to 2-D: the compiler reshapes")
		}
		return Softmax(xs[0], int(n.AttrInt("axis", -1)), op == "LogSoftmax")
	case "ReduceSum", "ReduceMean":
		var axes []int64
		if op == "ReduceSum" && opset >= 13 {
			if c := constIn(1); c != nil {
				v, err := c.Int64s()
				if err != nil {
					return nil, err
				}
				axes = v
			}
		} else {
			axes = n.AttrInts("axes", nil)
		}
		if len(axes) == 0 && n.AttrInt("noop_with_empty_axes", 0) == 1 {
			return Unary(xs[0], "Identity", 0, 0)
		}
		r := len(xs[0].Shape())
		norm := make([]int, len(axes))
		for i, a := range axes {
			if a < 0 {
				a += int64(r)
			}
			norm[i] = int(a)
		}
		return Reduce(xs[0], norm, n.AttrInt("keepdims", 1) == 1, op == "ReduceMean")
	}
	return nil, elemSkip("not an elementwise op")
}

// elemRunONNXSet runs one test data set of a backend case.
func elemRunONNXSet(t *testing.T, m *onnxlite.Model, set string) error {
	n := m.Graph.Nodes[0]
	inFiles, outFiles := onnxtestdata.SetFiles(set)
	require.NotEmpty(t, inFiles, set)
	require.Len(t, outFiles, 1, set)
	// input_i.pb holds the i-th graph input (onnx/backend/test/case/node)
	require.Len(t, inFiles, len(m.Graph.Inputs), set)
	for _, in := range m.Graph.Inputs {
		if in.Type == nil || in.Type.Kind != onnxlite.KindTensor {
			return elemSkip(fmt.Sprintf("input %q is not a tensor (sequence or optional)", in.Name))
		}
	}
	consts := map[string]*onnxlite.Tensor{}
	for i, p := range inFiles {
		tv, err := onnxlite.DecodeTensorFile(p, onnxlite.DecodeOptions{})
		require.NoError(t, err, p)
		consts[m.Graph.Inputs[i].Name] = tv
	}
	want, err := onnxlite.DecodeTensorFile(outFiles[0], onnxlite.DecodeOptions{})
	require.NoError(t, err, outFiles[0])

	g := G.NewGraph()
	var xs []*G.Node
	nodes := elemONNXOps[n.OpType]
	if e := consts[n.Inputs[len(n.Inputs)-1]]; n.OpType == "Pow" && e.NumElements() != 1 {
		nodes = 2 // a tensor exponent is a second operand
	}
	for i := 0; i < nodes; i++ {
		c := consts[n.Inputs[i]]
		require.NotNil(t, c, "input %q", n.Inputs[i])
		var dt tensor.Dtype
		switch c.DType {
		case onnxlite.Float:
			dt = tensor.Float32
		case onnxlite.Double:
			dt = tensor.Float64
		default:
			return elemSkip(fmt.Sprintf("input %d is %v: the kernels take float and double", i, c.DType))
		}
		v, err := c.Float64s()
		require.NoError(t, err)
		x, _ := elemInput(g, dt, c.Shape(), v, fmt.Sprintf("in%d", i))
		xs = append(xs, x)
	}
	y, err := elemFromONNX(n, m.OpsetVersion(""), xs, consts)
	if err != nil {
		return err
	}
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	require.NoError(t, vm.RunAll())

	assert.Equal(t, want.Shape(), []int(y.Shape()), "output shape")
	wantDT := tensor.Float32
	if want.DType == onnxlite.Double {
		wantDT = tensor.Float64
	}
	assert.Equal(t, wantDT, y.Dtype(), "output element type")
	wv, err := want.Float64s()
	require.NoError(t, err)
	got := elemValues(t, y.Value())
	require.Len(t, got, len(wv))
	for i := range wv {
		if math.IsNaN(wv[i]) {
			assert.True(t, math.IsNaN(got[i]), "[%d]: want NaN, got %v", i, got[i])
			continue
		}
		// ONNX backend test data 1.12.0 (libonnx-testdata), output_0.pb
		assert.InDelta(t, wv[i], got[i], 1e-4+1e-3*math.Abs(wv[i]), "%s: output[%d]", set, i)
	}
	return nil
}

// TestElementwiseMatchesONNXBackendData runs every single-node backend case
// of the operators above through the kernels and compares with the
// reference outputs of the ONNX backend test data.
func TestElementwiseMatchesONNXBackendData(t *testing.T) {
	dir := onnxtestdata.Dir(t)
	ran := map[string]int{}
	skipped := map[string]string{}
	for _, c := range onnxtestdata.Cases(t, dir) {
		if c.Suite != "node" || strings.HasSuffix(c.Name, "_expanded") || !elemHasPrefix(c.Name) {
			continue
		}
		m, err := onnxlite.DecodeFile(c.Model, onnxlite.DecodeOptions{})
		if err != nil {
			skipped[c.Name] = "model does not decode: " + err.Error()
			continue
		}
		if len(m.Graph.Nodes) != 1 {
			continue
		}
		op := m.Graph.Nodes[0].OpType
		if _, ok := elemONNXOps[op]; !ok {
			continue // e.g. test_expand_*, test_reduce_sum_square_*
		}
		t.Run(c.Name, func(t *testing.T) {
			require.NotEmpty(t, c.Sets)
			for _, set := range c.Sets {
				err := elemRunONNXSet(t, m, set)
				if s, ok := err.(elemSkip); ok {
					skipped[c.Name] = string(s)
					t.Skip(string(s))
				}
				require.NoError(t, err, set)
			}
			if !t.Failed() {
				ran[op]++
			}
		})
	}
	var names []string
	for name := range skipped {
		names = append(names, name)
	}
	sort.Strings(names)
	for _, name := range names {
		t.Logf("skipped %s: %s", name, skipped[name])
	}
	total := 0
	for op := range elemONNXOps {
		total += ran[op]
		// every operator has at least one float case in the ONNX 1.12.0 node tests
		assert.Positive(t, ran[op], "no backend case passed for %s", op)
	}
	t.Logf("%d backend cases passed, %d skipped", total, len(skipped))
}

func elemHasPrefix(name string) bool {
	for _, p := range elemONNXPrefixes {
		if strings.HasPrefix(name, p) {
			return true
		}
	}
	return false
}
