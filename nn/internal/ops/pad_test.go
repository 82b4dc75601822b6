package ops

import (
	"math/rand"
	"testing"

	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/onnxlite"
)

// padONNX builds a Pad node from its ONNX attributes (opset 2-10) or its
// pads and constant_value inputs (opset 11+).
func padONNX(t *testing.T, n *onnxlite.Node, ts []*onnxlite.Tensor, in []*G.Node) (*G.Node, error) {
	pads := convInts(n.AttrInts("pads", nil))
	value := float64(n.AttrFloat("value", 0))
	if len(ts) > 1 && ts[1] != nil {
		p, err := ts[1].Int64s()
		require.NoError(t, err)
		pads = convInts(p)
	}
	if len(ts) > 2 && ts[2] != nil {
		v, err := ts[2].Float64s()
		require.NoError(t, err)
		require.Len(t, v, 1)
		value = v[0]
	}
	return Pad(in[0], pads, n.AttrString("mode", "constant"), value)
}

func TestPadONNX(t *testing.T) {
	cases := []struct{ suite, name string }{
		{"node", "test_constant_pad"},
		{"node", "test_edge_pad"},
		{"node", "test_reflect_pad"},
		{"pytorch-converted", "test_ConstantPad2d"},
		{"pytorch-converted", "test_ReflectionPad2d"},
		{"pytorch-converted", "test_ReplicationPad2d"},
		{"pytorch-converted", "test_ZeroPad2d"},
		{"pytorch-operator", "test_operator_pad"},
	}
	for _, c := range cases {
		t.Run(c.suite+"/"+c.name, func(t *testing.T) {
			// ONNX backend test data 1.12.0 (forward values)
			convONNXCase(t, c.suite, c.name, padONNX)
		})
	}
}

// padCase is one gradient-check configuration.
type padCase struct {
	name  string
	x     []int
	pads  []int
	mode  string
	value float64
}

var padCases = []padCase{
	{"constant_2d", []int{1, 2, 3, 4}, []int{0, 0, 1, 2, 0, 0, 2, 1}, "constant", 1.5},
	{"constant_crop", []int{2, 3, 4, 5}, []int{0, -1, 2, -1, 0, 1, -2, 2}, "constant", -2},
	{"reflect_2d", []int{1, 2, 4, 5}, []int{0, 0, 3, 2, 0, 0, 1, 4}, "reflect", 0},
	{"reflect_all_axes", []int{3, 4, 3}, []int{1, 2, 2, 2, 3, 1}, "reflect", 0},
	{"reflect_crop", []int{1, 1, 5, 6}, []int{0, 0, -2, 3, 0, 0, 2, -1}, "reflect", 0},
	{"edge_2d", []int{1, 2, 3, 3}, []int{0, 0, 4, 1, 0, 0, 2, 5}, "edge", 0},
	{"edge_1d_rank1", []int{5}, []int{3, 4}, "edge", 0},
	{"edge_crop", []int{2, 2, 4, 4}, []int{-1, 0, 2, -3, 1, 0, -1, 3}, "edge", 0},
}

func (c padCase) build(in []*G.Node) (*G.Node, error) { return Pad(in[0], c.pads, c.mode, c.value) }

func TestPadGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(21))
	for _, c := range padCases {
		t.Run(c.name, func(t *testing.T) {
			// dx against central finite differences (float64, 1e-6 relative):
			// reflect and edge gradients accumulate onto the source elements
			convGradCheck(t, c.build, []convArr{convRandArr(rng, c.x...)})
		})
	}
}

func TestPadFloat32(t *testing.T) {
	rng := rand.New(rand.NewSource(22))
	for _, c := range padCases {
		t.Run(c.name, func(t *testing.T) {
			// IEEE 754 binary32 vs binary64 results, 1e-5 relative
			convPrecisionCheck(t, c.build, []convArr{convRandArr(rng, c.x...)})
		})
	}
}

func TestPadModes(t *testing.T) {
	// numpy.pad documentation examples for a = [1, 2, 3, 4, 5], pad (2, 3)
	// (the ONNX Pad doc defines its modes after numpy.pad):
	//   constant (4, 6): [4, 4, 1, 2, 3, 4, 5, 6, 6, 6] (constant_values=(4, 6);
	//   here one value: 4 on both sides)
	//   reflect: [3, 2, 1, 2, 3, 4, 5, 4, 3, 2]
	//   edge:    [1, 1, 1, 2, 3, 4, 5, 5, 5, 5]
	x := convArr{shape: []int{5}, data: []float64{1, 2, 3, 4, 5}}
	want := map[string][]float64{
		"constant": {4, 4, 1, 2, 3, 4, 5, 4, 4, 4},
		"reflect":  {3, 2, 1, 2, 3, 4, 5, 4, 3, 2},
		"edge":     {1, 1, 1, 2, 3, 4, 5, 5, 5, 5},
	}
	for mode, w := range want {
		y, _, _ := convGraph(t, tensor.Float64, func(in []*G.Node) (*G.Node, error) {
			return Pad(in[0], []int{2, 3}, mode, 4)
		}, []convArr{x}, nil)
		require.Equal(t, w, convFloats64(t, y.Value()), mode)
	}
}

func TestPadErrors(t *testing.T) {
	g := G.NewGraph()
	x := G.NewTensor(g, tensor.Float64, 2, G.WithShape(3, 4), G.WithName("x"))
	xi := G.NewTensor(g, tensor.Int, 2, G.WithShape(3, 4), G.WithName("xi"))
	cases := []struct {
		name   string
		x      *G.Node
		pads   []int
		mode   string
		target error
		msg    string
	}{
		// Each error names what was expected and what came (common practice).
		{"pads length", x, []int{1, 1}, "constant", ErrShape, "expected 4 pads"},
		{"unknown mode", x, []int{0, 0, 0, 0}, "mirror", ErrShape, `got "mirror"`},
		{"reflect too wide", x, []int{3, 0, 0, 0}, "reflect", ErrShape, "expected at most 2"},
		{"crop everything", x, []int{0, -2, 0, -2}, "edge", ErrShape, "leaves 0 elements"},
		{"int input", xi, []int{0, 0, 0, 0}, "constant", ErrShape, "float32 or float64"},
		{"oversized", x, []int{1 << 20, 1 << 20, 0, 0}, "constant", errTooLarge, "exceeds"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := Pad(c.x, c.pads, c.mode, 0)
			require.ErrorIs(t, err, c.target)
			require.Contains(t, err.Error(), c.msg)
		})
	}
	// A run-time input too small for reflect is an error from Do, not a panic.
	y, err := Pad(x, []int{0, 2, 0, 2}, "reflect", 0)
	require.NoError(t, err)
	_, err = y.Op().Do(tensor.New(tensor.WithShape(3, 2), tensor.WithBacking(make([]float64, 6))))
	require.ErrorIs(t, err, ErrShape)
	require.Contains(t, err.Error(), "expected at most 1")
}

func BenchmarkPad2D(b *testing.B) {
	rng := rand.New(rand.NewSource(1))
	x := convRandArr(rng, 1, 8, 28, 28).tensor(tensor.Float32)
	op := &padOp{rank: 4, pads: []int{0, 0, 2, 2, 0, 0, 2, 2}, mode: "reflect"}
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := op.Do(x); err != nil {
			b.Fatal(err)
		}
	}
}
