package ops

import (
	"math"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/onnxlite"
)

// poolONNX builds a MaxPool, AveragePool or global pool node from its ONNX
// attributes.
func poolONNX(t *testing.T, n *onnxlite.Node, ts []*onnxlite.Tensor, in []*G.Node) (*G.Node, error) {
	switch n.OpType {
	case "GlobalMaxPool":
		return GlobalPool(in[0], true)
	case "GlobalAveragePool":
		return GlobalPool(in[0], false)
	}
	kernel := convInts(n.AttrInts("kernel_shape", nil))
	pads, strides, dils := convTestSpatial(t, n, ts[0].Shape(), kernel)
	s := PoolSpec{Kernel: kernel, Pads: pads, Strides: strides, Dilations: dils,
		CeilMode: n.AttrInt("ceil_mode", 0) == 1, CountIncludePad: n.AttrInt("count_include_pad", 0) == 1}
	if n.OpType == "MaxPool" {
		// Only Y (output 0) is built and compared: the optional Indices
		// output is not supported.
		return MaxPool(in[0], s)
	}
	return AvgPool(in[0], s)
}

func TestPoolONNX(t *testing.T) {
	cases := []struct{ suite, name string }{
		{"node", "test_maxpool_1d_default"},
		{"node", "test_maxpool_2d_ceil"},
		{"node", "test_maxpool_2d_default"},
		{"node", "test_maxpool_2d_dilations"},
		{"node", "test_maxpool_2d_pads"},
		{"node", "test_maxpool_2d_precomputed_pads"},
		{"node", "test_maxpool_2d_precomputed_same_upper"},
		{"node", "test_maxpool_2d_precomputed_strides"},
		{"node", "test_maxpool_2d_same_lower"},
		{"node", "test_maxpool_2d_same_upper"},
		{"node", "test_maxpool_2d_strides"},
		{"node", "test_averagepool_1d_default"},
		{"node", "test_averagepool_2d_ceil"},
		{"node", "test_averagepool_2d_default"},
		{"node", "test_averagepool_2d_pads"},
		{"node", "test_averagepool_2d_pads_count_include_pad"},
		{"node", "test_averagepool_2d_precomputed_pads"},
		{"node", "test_averagepool_2d_precomputed_pads_count_include_pad"},
		{"node", "test_averagepool_2d_precomputed_same_upper"},
		{"node", "test_averagepool_2d_precomputed_strides"},
		{"node", "test_averagepool_2d_same_lower"},
		{"node", "test_averagepool_2d_same_upper"},
		{"node", "test_averagepool_2d_strides"},
		{"node", "test_globalaveragepool"},
		{"node", "test_globalaveragepool_precomputed"},
		{"node", "test_globalmaxpool"},
		{"node", "test_globalmaxpool_precomputed"},
		{"pytorch-converted", "test_AvgPool2d"},
		{"pytorch-converted", "test_AvgPool2d_stride"},
		{"pytorch-converted", "test_MaxPool1d"},
		{"pytorch-converted", "test_MaxPool1d_stride"},
		{"pytorch-converted", "test_MaxPool1d_stride_padding_dilation"},
		{"pytorch-converted", "test_MaxPool2d"},
		{"pytorch-converted", "test_MaxPool2d_stride_padding_dilation"},
		{"pytorch-operator", "test_operator_maxpool"},
		{"node", "test_maxpool_with_argmax_2d_precomputed_pads"},
		{"node", "test_maxpool_with_argmax_2d_precomputed_strides"},
	}
	for _, c := range cases {
		t.Run(c.suite+"/"+c.name, func(t *testing.T) {
			// ONNX backend test data 1.12.0 (forward values)
			convONNXCase(t, c.suite, c.name, poolONNX)
		})
	}
	skips := []struct{ suite, name, why string }{
		{"node", "test_maxpool_2d_uint8", "uint8 input: the pooling ops run on float32/float64 tensors, the element types attribution differentiates"},
		{"node", "test_maxpool_3d_default", "3-D (NCDHW) pooling is out of scope: 1-D and 2-D only"},
		{"node", "test_averagepool_3d_default", "3-D (NCDHW) pooling is out of scope: 1-D and 2-D only"},
		{"pytorch-converted", "test_AvgPool3d", "3-D (NCDHW) pooling is out of scope: 1-D and 2-D only"},
		{"pytorch-converted", "test_AvgPool3d_stride", "3-D (NCDHW) pooling is out of scope: 1-D and 2-D only"},
		{"pytorch-converted", "test_AvgPool3d_stride1_pad0_gpu_input", "3-D (NCDHW) pooling is out of scope: 1-D and 2-D only"},
		{"pytorch-converted", "test_MaxPool3d", "3-D (NCDHW) pooling is out of scope: 1-D and 2-D only"},
		{"pytorch-converted", "test_MaxPool3d_stride", "3-D (NCDHW) pooling is out of scope: 1-D and 2-D only"},
		{"pytorch-converted", "test_MaxPool3d_stride_padding", "3-D (NCDHW) pooling is out of scope: 1-D and 2-D only"},
		{"pytorch-converted", "test_AvgPool1d", "not a single-node model (Unsqueeze, AveragePool, Squeeze): the network conformance tests cover it"},
		{"pytorch-converted", "test_AvgPool1d_stride", "not a single-node model (Unsqueeze, AveragePool, Squeeze): the network conformance tests cover it"},
	}
	for _, s := range skips {
		t.Run(s.suite+"/"+s.name, func(t *testing.T) { t.Skip(s.why) })
	}
}

// poolCase is one gradient-check configuration.
type poolCase struct {
	name   string
	x      []int
	max    bool
	global bool
	spec   PoolSpec
}

var poolCases = []poolCase{
	{name: "max_2d", x: []int{2, 2, 5, 6}, max: true, spec: PoolSpec{Kernel: []int{2, 3}}},
	{name: "max_2d_strides_asym_pads", x: []int{1, 2, 7, 6}, max: true,
		spec: PoolSpec{Kernel: []int{3, 3}, Strides: []int{2, 2}, Pads: []int{1, 0, 2, 1}}},
	{name: "max_2d_dilations", x: []int{1, 2, 7, 7}, max: true,
		spec: PoolSpec{Kernel: []int{2, 3}, Dilations: []int{2, 2}, Pads: []int{1, 1, 0, 1}}},
	{name: "max_2d_ceil", x: []int{1, 3, 6, 7}, max: true,
		spec: PoolSpec{Kernel: []int{3, 2}, Strides: []int{2, 3}, CeilMode: true, Pads: []int{0, 1, 1, 0}}},
	{name: "max_2d_overlap", x: []int{1, 1, 6, 6}, max: true, spec: PoolSpec{Kernel: []int{3, 3}}},
	{name: "max_1d", x: []int{2, 3, 11}, max: true,
		spec: PoolSpec{Kernel: []int{3}, Strides: []int{2}, Dilations: []int{2}, Pads: []int{1, 2}, CeilMode: true}},
	{name: "avg_2d", x: []int{2, 2, 5, 6}, spec: PoolSpec{Kernel: []int{2, 3}}},
	{name: "avg_2d_pads_exclude", x: []int{1, 2, 6, 5}, spec: PoolSpec{Kernel: []int{3, 3}, Pads: []int{2, 1, 1, 2}, Strides: []int{2, 1}}},
	{name: "avg_2d_pads_include", x: []int{1, 2, 6, 5}, spec: PoolSpec{Kernel: []int{3, 3}, Pads: []int{2, 1, 1, 2}, Strides: []int{2, 1}, CountIncludePad: true}},
	{name: "avg_2d_ceil_include", x: []int{1, 2, 6, 6}, spec: PoolSpec{Kernel: []int{3, 3}, Strides: []int{2, 2}, Pads: []int{1, 1, 1, 1}, CeilMode: true, CountIncludePad: true}},
	{name: "avg_2d_ceil_exclude", x: []int{1, 2, 7, 6}, spec: PoolSpec{Kernel: []int{3, 3}, Strides: []int{2, 2}, CeilMode: true}},
	{name: "avg_2d_dilations", x: []int{1, 1, 8, 8}, spec: PoolSpec{Kernel: []int{2, 2}, Dilations: []int{3, 2}, Pads: []int{1, 0, 0, 1}, CountIncludePad: true}},
	{name: "avg_1d", x: []int{2, 2, 9}, spec: PoolSpec{Kernel: []int{4}, Strides: []int{3}, Pads: []int{2, 1}, CeilMode: true}},
	// Tiled pools (stride = kernel, no pads): the kernels of
	// pool_tiled.go, AVX2 for 2×2 float32 rows of ≥ 4 outputs (8 with an
	// overlapping last step, and 6 with two 4-wide steps); odd sizes leave
	// an uncovered border whose gradient is zero.
	{name: "max_2d_tiled", x: []int{2, 3, 9, 19}, max: true, spec: PoolSpec{Kernel: []int{2, 2}, Strides: []int{2, 2}}},
	{name: "max_2d_tiled_short_rows", x: []int{1, 2, 7, 13}, max: true, spec: PoolSpec{Kernel: []int{2, 2}, Strides: []int{2, 2}}},
	{name: "max_2d_tiled_3x2", x: []int{1, 2, 7, 8}, max: true, spec: PoolSpec{Kernel: []int{3, 2}, Strides: []int{3, 2}}},
	{name: "max_2d_tiled_end_pads", x: []int{1, 2, 6, 9}, max: true, spec: PoolSpec{Kernel: []int{2, 2}, Strides: []int{2, 2}, Pads: []int{0, 0, 1, 0}}},
	{name: "max_1d_tiled", x: []int{2, 3, 9}, max: true, spec: PoolSpec{Kernel: []int{2}, Strides: []int{2}}},
	{name: "avg_2d_tiled", x: []int{2, 2, 7, 9}, spec: PoolSpec{Kernel: []int{2, 2}, Strides: []int{2, 2}}},
	{name: "avg_2d_tiled_3x3", x: []int{1, 2, 7, 8}, spec: PoolSpec{Kernel: []int{3, 3}, Strides: []int{3, 3}, CountIncludePad: true}},
	{name: "global_max_2d", x: []int{2, 3, 4, 5}, max: true, global: true},
	{name: "global_avg_2d", x: []int{2, 3, 4, 5}, global: true},
	{name: "global_max_1d", x: []int{2, 3, 7}, max: true, global: true},
	{name: "global_avg_3d", x: []int{1, 2, 3, 2, 4}, global: true},
}

func (c poolCase) build(in []*G.Node) (*G.Node, error) {
	switch {
	case c.global:
		return GlobalPool(in[0], c.max)
	case c.max:
		return MaxPool(in[0], c.spec)
	}
	return AvgPool(in[0], c.spec)
}

func (c poolCase) inputs(rng *rand.Rand) []convArr {
	if c.max {
		return []convArr{convDistinctArr(rng, c.x...)}
	}
	return []convArr{convRandArr(rng, c.x...)}
}

func TestPoolGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(11))
	for _, c := range poolCases {
		t.Run(c.name, func(t *testing.T) {
			// dx against central finite differences (float64, 1e-6
			// relative); max-pool inputs are distinct, so no ties
			convGradCheck(t, c.build, c.inputs(rng))
		})
	}
}

func TestPoolFloat32(t *testing.T) {
	rng := rand.New(rand.NewSource(12))
	for _, c := range poolCases {
		t.Run(c.name, func(t *testing.T) {
			// IEEE 754 binary32 vs binary64 results, 1e-5 relative
			convPrecisionCheck(t, c.build, c.inputs(rng))
		})
	}
}

func TestPoolMaxTies(t *testing.T) {
	// Ties route the whole gradient to the first maximum in window order
	// (common practice: onnxruntime and PyTorch keep the first index).
	x := convArr{shape: []int{1, 1, 2, 4}, data: []float64{3, 3, 1, 2, 3, 3, 2, 1}}
	r := convArr{shape: []int{1, 1, 1, 2}, data: []float64{1, 10}}
	_, grads, _ := convGraph(t, tensor.Float64, func(in []*G.Node) (*G.Node, error) {
		return MaxPool(in[0], PoolSpec{Kernel: []int{2, 2}, Strides: []int{2, 2}})
	}, []convArr{x}, &r)
	// window 1 holds four 3s, window 2 ties 2s at (0, 3) and (1, 2)
	require.Equal(t, []float64{1, 0, 0, 10, 0, 0, 0, 0}, convFloats64(t, grads[0].Value()))
}

func TestPoolAverageCeilIncludePad(t *testing.T) {
	// x = [1, 2, 3, 4], k = 3, s = 2, pads (1, 1), ceil: windows start at
	// −1, 1, 3 (closed form of poolOutSize: ⌈3/2⌉ + 1 = 3). The last window
	// covers positions 3, 4, 5 of which 5 lies past the padded input
	// [−1, 5), so D = 2 with count_include_pad and D = 1 without:
	//   include: [(0+1+2)/3, (2+3+4)/3, (4+0)/2] = [1, 3, 2]
	//   exclude: [(1+2)/2, (2+3+4)/3, 4/1]       = [1.5, 3, 4]
	// (closed form; PyTorch avg_pool1d gives the same, from memory)
	// The same along W of NCW, W of NCHW and H of NCHW.
	layouts := []struct {
		shape []int
		spec  PoolSpec
	}{
		{[]int{1, 1, 4}, PoolSpec{Kernel: []int{3}, Strides: []int{2}, Pads: []int{1, 1}}},
		{[]int{1, 1, 1, 4}, PoolSpec{Kernel: []int{1, 3}, Strides: []int{1, 2}, Pads: []int{0, 1, 0, 1}}},
		{[]int{1, 1, 4, 1}, PoolSpec{Kernel: []int{3, 1}, Strides: []int{2, 1}, Pads: []int{1, 0, 1, 0}}},
	}
	for _, l := range layouts {
		x := convArr{shape: l.shape, data: []float64{1, 2, 3, 4}}
		for include, want := range map[bool][]float64{true: {1, 3, 2}, false: {1.5, 3, 4}} {
			s := l.spec
			s.CeilMode, s.CountIncludePad = true, include
			y, _, _ := convGraph(t, tensor.Float64, func(in []*G.Node) (*G.Node, error) {
				return AvgPool(in[0], s)
			}, []convArr{x}, nil)
			got := convFloats64(t, y.Value())
			require.Len(t, got, 3)
			for i := range want {
				require.InDelta(t, want[i], got[i], 1e-15, "shape %v include=%t element %d", l.shape, include, i)
			}
		}
	}
}

func TestPoolPaddingNeverWins(t *testing.T) {
	// ONNX MaxPool: pads are not values; an all-negative input keeps its
	// (negative) maxima although zero padding would be larger.
	x := convArr{shape: []int{1, 1, 2, 2}, data: []float64{-4, -3, -2, -1}}
	y, _, _ := convGraph(t, tensor.Float64, func(in []*G.Node) (*G.Node, error) {
		return MaxPool(in[0], PoolSpec{Kernel: []int{2, 2}, Pads: []int{1, 1, 1, 1}})
	}, []convArr{x}, nil)
	// closed form: window (i, j) of the 3×3 output covers the input
	// elements with row in {i−1, i} and column in {j−1, j}.
	require.Equal(t, []float64{-4, -3, -3, -2, -1, -1, -2, -1, -1}, convFloats64(t, y.Value()))
}

func TestPoolNaN(t *testing.T) {
	// IEEE 754 quiet NaN in a window propagates to that window's max and
	// mean (max: common practice, as PyTorch's max_pool does).
	x := convArr{shape: []int{1, 1, 4}, data: []float64{1, math.NaN(), 2, 5}}
	for _, takeMax := range []bool{true, false} {
		y, _, _ := convGraph(t, tensor.Float64, func(in []*G.Node) (*G.Node, error) {
			if takeMax {
				return MaxPool(in[0], PoolSpec{Kernel: []int{2}, Strides: []int{2}})
			}
			return AvgPool(in[0], PoolSpec{Kernel: []int{2}, Strides: []int{2}})
		}, []convArr{x}, nil)
		got := convFloats64(t, y.Value())
		require.True(t, math.IsNaN(got[0]))
		if takeMax {
			require.Equal(t, 5.0, got[1]) // max(2, 5), closed form
		} else {
			require.Equal(t, 3.5, got[1]) // (2 + 5)/2, closed form
		}
	}
}

func TestPoolErrors(t *testing.T) {
	g := G.NewGraph()
	x := G.NewTensor(g, tensor.Float64, 4, G.WithShape(1, 2, 4, 4), G.WithName("x"))
	x5 := G.NewTensor(g, tensor.Float64, 5, G.WithShape(1, 1, 2, 2, 2), G.WithName("x5"))
	xi := G.NewTensor(g, tensor.Int, 4, G.WithShape(1, 2, 4, 4), G.WithName("xi"))
	v := G.NewVector(g, tensor.Float64, G.WithShape(4), G.WithName("v"))
	cases := []struct {
		name string
		x    *G.Node
		spec PoolSpec
		msg  string
	}{
		// Each error names what was expected and what came (common practice).
		{"no kernel", x, PoolSpec{}, "expected 2 kernel sizes"},
		{"kernel too large", x, PoolSpec{Kernel: []int{5, 2}}, "larger than padded input"},
		{"dilated kernel too large", x, PoolSpec{Kernel: []int{2, 2}, Dilations: []int{4, 1}}, "larger than padded input"},
		{"rank 5", x5, PoolSpec{Kernel: []int{2, 2, 2}}, "rank 3 (NCW) or 4 (NCHW)"},
		{"int input", xi, PoolSpec{Kernel: []int{2, 2}}, "float32 or float64"},
		{"pads length", x, PoolSpec{Kernel: []int{2, 2}, Pads: []int{1}}, "expected 4 pads"},
		{"zero stride", x, PoolSpec{Kernel: []int{2, 2}, Strides: []int{1, 0}}, "strides ≥ 1"},
		{"zero kernel", x, PoolSpec{Kernel: []int{0, 2}}, "positive kernel"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			for _, f := range []func(*G.Node, PoolSpec) (*G.Node, error){MaxPool, AvgPool} {
				_, err := f(c.x, c.spec)
				require.ErrorIs(t, err, ErrShape)
				require.Contains(t, err.Error(), c.msg)
			}
		})
	}
	_, err := GlobalPool(v, true)
	require.ErrorIs(t, err, ErrShape)
	require.Contains(t, err.Error(), "rank ≥ 3")
	_, err = MaxPool(nil, PoolSpec{})
	require.ErrorIs(t, err, ErrShape)

	// A run-time input of the wrong rank is an error from Do, not a panic.
	y, err := MaxPool(x, PoolSpec{Kernel: []int{2, 2}})
	require.NoError(t, err)
	_, err = y.Op().Do(tensor.New(tensor.WithShape(2, 4, 4), tensor.WithBacking(make([]float64, 32))))
	require.ErrorIs(t, err, ErrShape)
	require.Contains(t, err.Error(), "expected input of rank 4")
}

func BenchmarkMaxPool2D(b *testing.B) {
	rng := rand.New(rand.NewSource(1))
	x := convRandArr(rng, 1, 16, 28, 28).tensor(tensor.Float32)
	op := &poolOp{rank: 2, max: true, kernel: []int{2, 2}, pads: []int{0, 0, 0, 0}, strides: []int{2, 2}, dils: []int{1, 1}}
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := op.Do(x); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkAvgPool2D(b *testing.B) {
	rng := rand.New(rand.NewSource(1))
	x := convRandArr(rng, 1, 16, 28, 28).tensor(tensor.Float32)
	op := &poolOp{rank: 2, kernel: []int{3, 3}, pads: []int{1, 1, 1, 1}, strides: []int{2, 2}, dils: []int{1, 1}, includePad: true}
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := op.Do(x); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkMaxPool2DBackward(b *testing.B) {
	rng := rand.New(rand.NewSource(1))
	x := convRandArr(rng, 1, 16, 28, 28).tensor(tensor.Float32)
	dy := convRandArr(rng, 1, 16, 14, 14).tensor(tensor.Float32)
	op := &poolBackOp{poolOp{rank: 2, max: true, kernel: []int{2, 2}, pads: []int{0, 0, 0, 0}, strides: []int{2, 2}, dils: []int{1, 1}}}
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := op.Do(x, dy); err != nil {
			b.Fatal(err)
		}
	}
}
