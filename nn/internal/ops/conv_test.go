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

// convONNXConv builds a Conv node from its ONNX attributes.
func convONNXConv(t *testing.T, n *onnxlite.Node, ts []*onnxlite.Tensor, in []*G.Node) (*G.Node, error) {
	ws := ts[1].Shape()
	pads, strides, dils := convTestSpatial(t, n, ts[0].Shape(), ws[2:])
	var b *G.Node
	if len(in) > 2 {
		b = in[2]
	}
	return Conv(in[0], in[1], b, ConvSpec{Pads: pads, Strides: strides, Dilations: dils, Group: int(n.AttrInt("group", 1))})
}

func TestConvONNX(t *testing.T) {
	cases := []struct{ suite, name string }{
		{"node", "test_basic_conv_with_padding"},
		{"node", "test_basic_conv_without_padding"},
		{"node", "test_conv_with_autopad_same"},
		{"node", "test_conv_with_strides_and_asymmetric_padding"},
		{"node", "test_conv_with_strides_no_padding"},
		{"node", "test_conv_with_strides_padding"},
		{"pytorch-converted", "test_Conv1d"},
		{"pytorch-converted", "test_Conv1d_dilated"},
		{"pytorch-converted", "test_Conv1d_groups"},
		{"pytorch-converted", "test_Conv1d_pad1"},
		{"pytorch-converted", "test_Conv1d_pad1size1"},
		{"pytorch-converted", "test_Conv1d_pad2"},
		{"pytorch-converted", "test_Conv1d_pad2size1"},
		{"pytorch-converted", "test_Conv1d_stride"},
		{"pytorch-converted", "test_Conv2d"},
		{"pytorch-converted", "test_Conv2d_depthwise"},
		{"pytorch-converted", "test_Conv2d_depthwise_padded"},
		{"pytorch-converted", "test_Conv2d_depthwise_strided"},
		{"pytorch-converted", "test_Conv2d_depthwise_with_multiplier"},
		{"pytorch-converted", "test_Conv2d_dilated"},
		{"pytorch-converted", "test_Conv2d_groups"},
		{"pytorch-converted", "test_Conv2d_groups_thnn"},
		{"pytorch-converted", "test_Conv2d_no_bias"},
		{"pytorch-converted", "test_Conv2d_padding"},
		{"pytorch-converted", "test_Conv2d_strided"},
		{"pytorch-operator", "test_operator_conv"},
	}
	for _, c := range cases {
		t.Run(c.suite+"/"+c.name, func(t *testing.T) {
			// ONNX backend test data 1.12.0 (forward values)
			convONNXCase(t, c.suite, c.name, convONNXConv)
		})
	}
	for _, name := range []string{"test_Conv3d", "test_Conv3d_dilated", "test_Conv3d_dilated_strided",
		"test_Conv3d_groups", "test_Conv3d_no_bias", "test_Conv3d_stride", "test_Conv3d_stride_padding"} {
		t.Run("pytorch-converted/"+name, func(t *testing.T) {
			t.Skip("3-D (NCDHW) convolution is out of scope: conv supports 1-D and 2-D spatial data")
		})
	}
	for _, name := range []string{"test_convtranspose", "test_convinteger_with_padding", "test_basic_convinteger", "test_qlinearconv"} {
		t.Run("node/"+name, func(t *testing.T) {
			t.Skip("ConvTranspose and integer/quantised convolutions are other operators, not Conv")
		})
	}
}

// convCase is one gradient-check configuration.
type convCase struct {
	name   string
	x, w   []int
	bias   bool
	spec   ConvSpec
	direct bool // 1×1 kernel, unit stride, no padding
}

var convCases = []convCase{
	{name: "2d", x: []int{2, 3, 5, 6}, w: []int{4, 3, 3, 2}, bias: true},
	{name: "2d_no_bias", x: []int{1, 2, 5, 5}, w: []int{3, 2, 3, 3}},
	{name: "2d_strides_asym_pads", x: []int{2, 2, 7, 6}, w: []int{3, 2, 3, 3}, bias: true,
		spec: ConvSpec{Pads: []int{1, 0, 2, 1}, Strides: []int{2, 3}}},
	{name: "2d_dilations", x: []int{1, 2, 8, 7}, w: []int{2, 2, 3, 2}, bias: true,
		spec: ConvSpec{Pads: []int{2, 1, 1, 2}, Dilations: []int{2, 3}}},
	{name: "2d_groups", x: []int{2, 4, 5, 5}, w: []int{6, 2, 3, 3}, bias: true,
		spec: ConvSpec{Group: 2, Pads: []int{1, 1, 1, 1}}},
	{name: "2d_depthwise", x: []int{1, 3, 6, 5}, w: []int{3, 1, 3, 3}, bias: true,
		spec: ConvSpec{Group: 3, Strides: []int{2, 1}, Pads: []int{0, 1, 1, 0}}},
	{name: "2d_depthwise_multiplier", x: []int{1, 2, 5, 5}, w: []int{4, 1, 2, 2}, bias: true,
		spec: ConvSpec{Group: 2, Dilations: []int{2, 1}}},
	{name: "2d_1x1", x: []int{2, 3, 4, 3}, w: []int{5, 3, 1, 1}, bias: true, direct: true},
	{name: "1d", x: []int{2, 3, 9}, w: []int{4, 3, 3}, bias: true,
		spec: ConvSpec{Pads: []int{2, 1}, Strides: []int{2}, Dilations: []int{2}}},
	{name: "1d_groups", x: []int{1, 4, 7}, w: []int{2, 2, 2}, bias: true, spec: ConvSpec{Group: 2, Pads: []int{0, 3}}},
}

func (c convCase) build(in []*G.Node) (*G.Node, error) {
	var b *G.Node
	if c.bias {
		b = in[2]
	}
	return Conv(in[0], in[1], b, c.spec)
}

func (c convCase) inputs(rng *rand.Rand) []convArr {
	ins := []convArr{convRandArr(rng, c.x...), convRandArr(rng, c.w...)}
	if c.bias {
		ins = append(ins, convRandArr(rng, c.w[0]))
	}
	return ins
}

func TestConvGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(7))
	for _, c := range convCases {
		t.Run(c.name, func(t *testing.T) {
			if c.direct {
				require.True(t, convDirect(&convGeom{kh: 1, kw: 1, sh: 1, sw: 1}))
			}
			// dx, dw and db against central finite differences (float64, 1e-6 relative)
			convGradCheck(t, c.build, c.inputs(rng))
		})
	}
}

func TestConvFloat32(t *testing.T) {
	rng := rand.New(rand.NewSource(8))
	for _, c := range convCases {
		t.Run(c.name, func(t *testing.T) {
			// IEEE 754 binary32 vs binary64 results, 1e-5 relative
			convPrecisionCheck(t, c.build, c.inputs(rng))
		})
	}
}

// TestConvDefinition checks the im2col + GEMM forward pass against the
// defining sum of the ONNX Conv operator, evaluated directly (ONNX Conv
// operator doc; the reference implementation Conv() of onnx 1.12 computes
// the same sum).
func TestConvDefinition(t *testing.T) {
	rng := rand.New(rand.NewSource(9))
	for _, c := range convCases {
		t.Run(c.name, func(t *testing.T) {
			ins := c.inputs(rng)
			y, _, _ := convGraph(t, tensor.Float64, c.build, ins, nil)
			got := convFloats64(t, y.Value())
			want := convNaive(c, ins, y.Shape())
			for i := range want {
				// defining sum of ONNX Conv, float64 rounding only
				require.InDelta(t, want[i], got[i], 1e-12)
			}
		})
	}
}

// convNaive evaluates y[n,m,o] = b[m] + Σ w[m,c,k]·x[n, g·Cg + c, o·s − p + k·d]
// with direct loops over 1-D or 2-D data.
func convNaive(c convCase, ins []convArr, yshape tensor.Shape) []float64 {
	rank := len(c.x) - 2
	pads, strides, dils, _ := convNormalize(rank, c.spec.Pads, c.spec.Strides, c.spec.Dilations)
	group := max(c.spec.Group, 1)
	x, w := ins[0].data, ins[1].data
	xs := append([]int(nil), c.x...)
	ws := append([]int(nil), c.w...)
	ys := append([]int(nil), yshape...)
	if rank == 1 { // view as H = 1
		xs = []int{xs[0], xs[1], 1, xs[2]}
		ws = []int{ws[0], ws[1], 1, ws[2]}
		ys = []int{ys[0], ys[1], 1, ys[2]}
		pads = []int{0, pads[0], 0, pads[1]}
		strides = []int{1, strides[0]}
		dils = []int{1, dils[0]}
	}
	N, C, H, W := xs[0], xs[1], xs[2], xs[3]
	M, Cg, KH, KW := ws[0], ws[1], ws[2], ws[3]
	OH, OW := ys[2], ys[3]
	out := make([]float64, N*M*OH*OW)
	for n := 0; n < N; n++ {
		for m := 0; m < M; m++ {
			g := m / (M / group)
			for oy := 0; oy < OH; oy++ {
				for ox := 0; ox < OW; ox++ {
					s := 0.0
					if c.bias {
						s = ins[2].data[m]
					}
					for ci := 0; ci < Cg; ci++ {
						for ky := 0; ky < KH; ky++ {
							for kx := 0; kx < KW; kx++ {
								iy := oy*strides[0] - pads[0] + ky*dils[0]
								ix := ox*strides[1] - pads[1] + kx*dils[1]
								if iy < 0 || iy >= H || ix < 0 || ix >= W {
									continue
								}
								s += w[((m*Cg+ci)*KH+ky)*KW+kx] * x[((n*C+g*Cg+ci)*H+iy)*W+ix]
							}
						}
					}
					out[((n*M+m)*OH+oy)*OW+ox] = s
				}
			}
		}
	}
	return out
}

func TestConvErrors(t *testing.T) {
	g := G.NewGraph()
	x := G.NewTensor(g, tensor.Float64, 4, G.WithShape(1, 4, 5, 5), G.WithName("x"))
	w := G.NewTensor(g, tensor.Float64, 4, G.WithShape(2, 2, 3, 3), G.WithName("w"))
	w32 := G.NewTensor(g, tensor.Float32, 4, G.WithShape(2, 4, 3, 3), G.WithName("w32"))
	b := G.NewVector(g, tensor.Float64, G.WithShape(3), G.WithName("b"))
	x5 := G.NewTensor(g, tensor.Float64, 5, G.WithShape(1, 1, 2, 2, 2), G.WithName("x5"))
	big := G.NewTensor(g, tensor.Float64, 4, G.WithShape(1, 1, 1<<16, 1<<16), G.WithName("big"))
	wbig := G.NewTensor(g, tensor.Float64, 4, G.WithShape(1, 1, 3, 3), G.WithName("wbig"))
	cases := []struct {
		name    string
		x, w, b *G.Node
		spec    ConvSpec
		target  error
		msg     string
	}{
		// Each error names what was expected and what came (common practice).
		{"channels vs group", x, w, nil, ConvSpec{}, ErrShape, "group 1"},
		{"bias length", x, w, b, ConvSpec{Group: 2}, ErrShape, "expected bias of shape (2)"},
		{"mixed dtype", x, w32, nil, ConvSpec{}, ErrShape, "mixed dtypes"},
		{"rank 5", x5, x5, nil, ConvSpec{}, ErrShape, "rank 3 (NCW) or 4 (NCHW)"},
		{"pads length", x, w, nil, ConvSpec{Group: 2, Pads: []int{1, 1}}, ErrShape, "expected 4 pads"},
		{"negative pads", x, w, nil, ConvSpec{Group: 2, Pads: []int{-1, 0, 0, 0}}, ErrShape, "non-negative"},
		{"zero stride", x, w, nil, ConvSpec{Group: 2, Strides: []int{0, 1}}, ErrShape, "strides ≥ 1"},
		{"kernel too large", x, w, nil, ConvSpec{Group: 2, Dilations: []int{3, 1}}, ErrShape, "does not fit"},
		{"negative group", x, w, nil, ConvSpec{Group: -2}, ErrShape, "group ≥ 1"},
		{"oversized", big, wbig, nil, ConvSpec{}, errTooLarge, "exceeds"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := Conv(c.x, c.w, c.b, c.spec)
			require.ErrorIs(t, err, c.target)
			require.Contains(t, err.Error(), c.msg)
		})
	}
	_, err := Conv(nil, w, nil, ConvSpec{})
	require.ErrorIs(t, err, ErrShape)

	// A run-time input that does not match the op's attributes is an error
	// from Do, not a panic.
	y, err := Conv(x, w, nil, ConvSpec{Group: 2})
	require.NoError(t, err)
	_, err = y.Op().Do(tensor.New(tensor.WithShape(1, 3, 5, 5), tensor.WithBacking(make([]float64, 75))),
		tensor.New(tensor.WithShape(2, 2, 3, 3), tensor.WithBacking(make([]float64, 36))))
	require.ErrorIs(t, err, ErrShape)
}

func TestConvNaN(t *testing.T) {
	// IEEE 754: NaN propagates through + and ×, so every output whose window
	// reads the NaN input is NaN and the others are finite.
	x := convArr{shape: []int{1, 1, 1, 5}, data: []float64{1, 2, math.NaN(), 4, 5}}
	w := convArr{shape: []int{1, 1, 1, 2}, data: []float64{1, 1}}
	y, _, _ := convGraph(t, tensor.Float64, func(in []*G.Node) (*G.Node, error) {
		return Conv(in[0], in[1], nil, ConvSpec{})
	}, []convArr{x, w}, nil)
	got := convFloats64(t, y.Value())
	require.Equal(t, 3.0, got[0]) // 1 + 2 (closed form)
	require.True(t, math.IsNaN(got[1]))
	require.True(t, math.IsNaN(got[2]))
	require.Equal(t, 9.0, got[3]) // 4 + 5 (closed form)
}

func BenchmarkConv2D(b *testing.B) {
	rng := rand.New(rand.NewSource(1))
	for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
		b.Run(dt.String(), func(b *testing.B) {
			x := convRandArr(rng, 1, 8, 28, 28).tensor(dt)
			w := convRandArr(rng, 16, 8, 3, 3).tensor(dt)
			bias := convRandArr(rng, 16).tensor(dt)
			op := &convOp{rank: 2, pads: []int{1, 1, 1, 1}, strides: []int{1, 1}, dils: []int{1, 1}, group: 1, bias: true}
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				if _, err := op.Do(x, w, bias); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

func BenchmarkConv2DBackward(b *testing.B) {
	rng := rand.New(rand.NewSource(1))
	x := convRandArr(rng, 1, 8, 28, 28).tensor(tensor.Float32)
	w := convRandArr(rng, 16, 8, 3, 3).tensor(tensor.Float32)
	dy := convRandArr(rng, 1, 16, 28, 28).tensor(tensor.Float32)
	op := &convBackOp{convOp: convOp{rank: 2, pads: []int{1, 1, 1, 1}, strides: []int{1, 1}, dils: []int{1, 1}, group: 1}}
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := op.Do(x, w, dy); err != nil {
			b.Fatal(err)
		}
	}
}

func TestConvConstantWeights(t *testing.T) {
	// With constant weights and bias only dx is built; it must equal dx of
	// the all-variable graph (same gradient, checked against central finite
	// differences in TestConvGradients).
	rng := rand.New(rand.NewSource(31))
	c := convCases[4] // groups
	ins := c.inputs(rng)
	var r convArr
	_, want, _ := convGraph(t, tensor.Float64, c.build, ins, &r)

	g := G.NewGraph()
	x := G.NewTensor(g, tensor.Float64, 4, G.WithShape(c.x...), G.WithValue(ins[0].tensor(tensor.Float64)))
	w := G.NewConstant(ins[1].tensor(tensor.Float64))
	b := G.NewConstant(ins[2].tensor(tensor.Float64))
	y, err := c.build([]*G.Node{x, w, b})
	require.NoError(t, err)
	cost, err := G.Sum(G.Must(G.HadamardProd(y, G.NewConstant(r.tensor(tensor.Float64)))))
	require.NoError(t, err)
	grads, err := G.Grad(cost, x)
	require.NoError(t, err)
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	require.NoError(t, vm.RunAll())
	require.Equal(t, convFloats64(t, want[0].Value()), convFloats64(t, grads[0].Value()))
	for _, n := range g.AllNodes() {
		if back, ok := n.Op().(*convBackOp); ok {
			require.Equal(t, 0, back.wrt, "no weight or bias gradient for constants")
		}
	}
}

func TestConvConcurrentDo(t *testing.T) {
	// The op's scratch is taken out of its slot for a run, and a run that
	// finds the slot empty works on fresh scratch: concurrent runs of one
	// instance give the serial result bit for bit (common practice; run
	// with -race). TestConvConcurrentDo32 checks the float32 routes.
	rng := rand.New(rand.NewSource(32))
	c := convCases[2]
	ins := c.inputs(rng)
	y, _, _ := convGraph(t, tensor.Float64, c.build, ins, nil)
	want := convFloats64(t, y.Value())
	errs := make(chan error, 8)
	outs := make(chan []float64, 8)
	for i := 0; i < 8; i++ {
		go func() {
			vals := []G.Value{ins[0].tensor(tensor.Float64), ins[1].tensor(tensor.Float64), ins[2].tensor(tensor.Float64)}
			var last G.Value
			for k := 0; k < 20; k++ {
				v, err := y.Op().Do(vals...)
				if err != nil {
					errs <- err
					return
				}
				last = v
			}
			errs <- nil
			outs <- last.Data().([]float64)
		}()
	}
	for i := 0; i < 8; i++ {
		require.NoError(t, <-errs)
	}
	for i := 0; i < 8; i++ {
		require.Equal(t, want, <-outs)
	}
}
