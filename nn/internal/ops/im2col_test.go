package ops

import (
	"math"
	"math/rand"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/onnxlite"
)

// convArr is one test input: a shape and row-major float64 values.
type convArr struct {
	shape []int
	data  []float64
}

// convRandArr draws uniform values in [-1, 1).
func convRandArr(rng *rand.Rand, shape ...int) convArr {
	n := 1
	for _, s := range shape {
		n *= s
	}
	d := make([]float64, n)
	for i := range d {
		d[i] = 2*rng.Float64() - 1
	}
	return convArr{shape: shape, data: d}
}

// convDistinctArr draws a random permutation of n values spaced 1/n apart
// in [-1, 1): no two inputs are within 2h of each other for the finite
// difference step h used below, so max pooling has no ties.
func convDistinctArr(rng *rand.Rand, shape ...int) convArr {
	a := convRandArr(rng, shape...)
	n := len(a.data)
	for i, p := range rng.Perm(n) {
		a.data[i] = 2*float64(p)/float64(n) - 1
	}
	return a
}

// tensor wraps a copy of a as a tensor of dtype dt.
func (a convArr) tensor(dt tensor.Dtype) *tensor.Dense {
	if dt == tensor.Float32 {
		f := make([]float32, len(a.data))
		for i, v := range a.data {
			f[i] = float32(v)
		}
		return tensor.New(tensor.WithShape(a.shape...), tensor.WithBacking(f))
	}
	return tensor.New(tensor.WithShape(a.shape...), tensor.WithBacking(append([]float64(nil), a.data...)))
}

// convFloats64 returns the values of a float32 or float64 tensor as float64s.
func convFloats64(t *testing.T, v G.Value) []float64 {
	t.Helper()
	switch d := v.Data().(type) {
	case []float64:
		return append([]float64(nil), d...)
	case []float32:
		out := make([]float64, len(d))
		for i, x := range d {
			out[i] = float64(x)
		}
		return out
	}
	t.Fatalf("unexpected value type %T", v.Data())
	return nil
}

// convBuildFn builds the op under test on the graph input nodes.
type convBuildFn func(in []*G.Node) (*G.Node, error)

// convGraph builds the inputs as graph variables of dtype dt, applies build
// and, when withGrad, the cost Σ r·y with r a fixed random weighting of
// the output and its gradients with respect to every input. It returns the
// output node and the gradient nodes after running the graph.
func convGraph(t *testing.T, dt tensor.Dtype, build convBuildFn, ins []convArr, r *convArr) (*G.Node, G.Nodes, *convArr) {
	t.Helper()
	g := G.NewGraph()
	nodes := make([]*G.Node, len(ins))
	for i, a := range ins {
		nodes[i] = G.NewTensor(g, dt, len(a.shape), G.WithShape(a.shape...), G.WithValue(a.tensor(dt)))
	}
	y, err := build(nodes)
	require.NoError(t, err)
	var grads G.Nodes
	if r != nil {
		if r.data == nil {
			*r = convRandArr(rand.New(rand.NewSource(99)), y.Shape()...)
		}
		rn := G.NewConstant(r.tensor(dt))
		cost, err := G.Sum(G.Must(G.HadamardProd(y, rn)))
		require.NoError(t, err)
		grads, err = G.Grad(cost, nodes...)
		require.NoError(t, err)
	}
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	require.NoError(t, vm.RunAll())
	return y, grads, r
}

// convForwardDo runs the op of y directly on the inputs (float64).
func convForwardDo(t *testing.T, y *G.Node, ins []convArr) []float64 {
	t.Helper()
	vals := make([]G.Value, len(ins))
	for i, a := range ins {
		vals[i] = a.tensor(tensor.Float64)
	}
	out, err := y.Op().Do(vals...)
	require.NoError(t, err)
	return convFloats64(t, out)
}

// convGradCheck compares the symbolic gradients of Σ r·build(ins) with
// respect to every input against central finite differences
// (f(x+h) − f(x−h)) / 2h in float64, to 1e-6 relative: the ops are
// piecewise linear in each input, so the central difference is exact up to
// rounding (central finite differences, truncation error O(h²·f”')).
func convGradCheck(t *testing.T, build convBuildFn, ins []convArr) {
	t.Helper()
	var r convArr
	y, grads, _ := convGraph(t, tensor.Float64, build, ins, &r)
	const h = 1e-5
	f := func() float64 {
		out := convForwardDo(t, y, ins)
		s := 0.0
		for i, v := range out {
			s += r.data[i] * v
		}
		return s
	}
	for i, a := range ins {
		got := convFloats64(t, grads[i].Value())
		require.Len(t, got, len(a.data))
		for j := range a.data {
			x0 := a.data[j]
			a.data[j] = x0 + h
			fp := f()
			a.data[j] = x0 - h
			fm := f()
			a.data[j] = x0
			want := (fp - fm) / (2 * h)
			// central finite differences, 1e-6 relative to max(|want|, 1)
			require.InDeltaf(t, want, got[j], 1e-6*math.Max(1, math.Abs(want)), "input %d element %d", i, j)
		}
	}
}

// convPrecisionCheck runs build in float32 and float64 and requires the
// outputs and the gradients of Σ r·y to agree to 1e-5 relative (max-norm:
// max|a−b| ≤ 1e-5·max|b|): float32 carries 24 significand bits, a relative
// rounding of 6e-8 per operation (IEEE 754 binary32).
func convPrecisionCheck(t *testing.T, build convBuildFn, ins []convArr) {
	t.Helper()
	var r convArr
	y64, g64, _ := convGraph(t, tensor.Float64, build, ins, &r)
	y32, g32, _ := convGraph(t, tensor.Float32, build, ins, &r)
	require.Equal(t, tensor.Float32, y32.Dtype())
	cmp := func(what string, a, b []float64) {
		require.Len(t, a, len(b))
		scale := 0.0
		for _, v := range b {
			scale = math.Max(scale, math.Abs(v))
		}
		for i := range a {
			// IEEE 754 binary32 vs binary64, 1e-5 max-norm relative
			require.InDeltaf(t, b[i], a[i], 1e-5*math.Max(scale, 1e-30), "%s element %d", what, i)
		}
	}
	cmp("output", convFloats64(t, y32.Value()), convFloats64(t, y64.Value()))
	for i := range g64 {
		cmp("gradient", convFloats64(t, g32[i].Value()), convFloats64(t, g64[i].Value()))
	}
}

// convONNXBuild builds the node under test from its ONNX node, the input
// tensors in node input order (nil for omitted optional inputs) and graph
// variables for the float inputs (nil for the others).
type convONNXBuild func(t *testing.T, n *onnxlite.Node, ts []*onnxlite.Tensor, in []*G.Node) (*G.Node, error)

// convONNXCase runs a single-node backend test case (ONNX backend test
// data 1.12.0) in float32 (the stored type) and float64, and compares the
// output with output_0.pb within 1e-4 + 1e-3·|want|.
func convONNXCase(t *testing.T, suite, name string, build convONNXBuild) {
	t.Helper()
	dir := onnxtestdata.Dir(t)
	cdir := filepath.Join(dir, suite, name)
	m, err := onnxlite.DecodeFile(filepath.Join(cdir, "model.onnx"), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	require.Len(t, m.Graph.Nodes, 1, "single-node model expected")
	node := m.Graph.Nodes[0]
	inits := map[string]*onnxlite.Tensor{}
	for _, it := range m.Graph.Initializers {
		inits[it.Name] = it
	}
	var runtime []string
	for _, vi := range m.Graph.Inputs {
		if _, ok := inits[vi.Name]; !ok {
			runtime = append(runtime, vi.Name)
		}
	}
	c := onnxtestdata.Case{Suite: suite, Name: name, Dir: cdir}
	for _, cs := range onnxtestdata.Cases(t, dir) {
		if cs.Suite == suite && cs.Name == name {
			c = cs
		}
	}
	require.NotEmpty(t, c.Sets, "no test data sets in %s", cdir)
	for _, set := range c.Sets {
		inFiles, outFiles := onnxtestdata.SetFiles(set)
		require.Len(t, inFiles, len(runtime))
		require.NotEmpty(t, outFiles)
		byName := map[string]*onnxlite.Tensor{}
		for k, v := range inits {
			byName[k] = v
		}
		for i, f := range inFiles {
			tt, err := onnxlite.DecodeTensorFile(f, onnxlite.DecodeOptions{})
			require.NoError(t, err)
			byName[runtime[i]] = tt
		}
		want, err := onnxlite.DecodeTensorFile(outFiles[0], onnxlite.DecodeOptions{})
		require.NoError(t, err)
		wantV, err := want.Float64s()
		require.NoError(t, err)
		for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
			g := G.NewGraph()
			ts := make([]*onnxlite.Tensor, len(node.Inputs))
			nodes := make([]*G.Node, len(node.Inputs))
			for i, in := range node.Inputs {
				if in == "" {
					continue
				}
				tt, ok := byName[in]
				require.True(t, ok, "input %q not found", in)
				ts[i] = tt
				// The data input of an int32 case (Pad) runs as floats: every
				// int32 of magnitude ≤ 2^24 is exact in binary32 (IEEE 754,
				// 24-bit significand), so the comparison stays exact.
				isInt := i == 0 && tt.DType == onnxlite.Int32
				if tt.DType != onnxlite.Float && tt.DType != onnxlite.Double && !isInt {
					continue
				}
				v, err := tt.Float64s()
				require.NoError(t, err)
				if isInt {
					for _, x := range v {
						require.LessOrEqual(t, math.Abs(x), float64(1<<24))
					}
				}
				a := convArr{shape: tt.Shape(), data: v}
				nodes[i] = G.NewTensor(g, dt, len(a.shape), G.WithShape(a.shape...), G.WithValue(a.tensor(dt)), G.WithName(in))
			}
			y, err := build(t, node, ts, nodes)
			require.NoError(t, err)
			vm := G.NewTapeMachine(g)
			require.NoError(t, vm.RunAll())
			vm.Close()
			require.Equal(t, want.Shape(), []int(y.Shape()), "output shape (%v)", dt)
			got := convFloats64(t, y.Value())
			for i := range wantV {
				// ONNX backend test data 1.12.0, 1e-4 + 1e-3·|want|
				// (testify is called only on a mismatch: the large cases
				// hold ~10^6 values)
				if tol := 1e-4 + 1e-3*math.Abs(wantV[i]); !(math.Abs(wantV[i]-got[i]) <= tol) {
					require.InDeltaf(t, wantV[i], got[i], tol, "%s %v element %d", filepath.Base(set), dt, i)
				}
			}
		}
	}
}

// convInts converts ONNX int64 attribute values.
func convInts(v []int64) []int {
	if v == nil {
		return nil
	}
	out := make([]int, len(v))
	for i, x := range v {
		out[i] = int(x)
	}
	return out
}

// convTestSpatial resolves the common Conv/pool attributes of n for an
// input of shape xs and the given kernel.
func convTestSpatial(t *testing.T, n *onnxlite.Node, xs, kernel []int) (pads, strides, dils []int) {
	t.Helper()
	strides = convInts(n.AttrInts("strides", nil))
	dils = convInts(n.AttrInts("dilations", nil))
	pads, err := ResolvePads(n.AttrString("auto_pad", "NOTSET"), xs[2:], kernel, strides, dils, convInts(n.AttrInts("pads", nil)))
	require.NoError(t, err)
	return pads, strides, dils
}

func TestConvIm2colAdjoint(t *testing.T) {
	// col2im is the adjoint of im2col: ⟨im2col(x), c⟩ = ⟨x, col2im(c)⟩ for
	// all x, c (definition of the adjoint of a linear map, common practice).
	rng := rand.New(rand.NewSource(1))
	geoms := []convGeom{
		{h: 5, w: 6, kh: 3, kw: 2, pt: 1, pl: 0, pb: 2, pr: 1, sh: 2, sw: 1, dh: 1, dw: 2},
		{h: 1, w: 9, kh: 1, kw: 3, pl: 2, pr: 1, sh: 1, sw: 3, dh: 1, dw: 2},
		{h: 4, w: 4, kh: 1, kw: 1, sh: 1, sw: 1, dh: 1, dw: 1},
	}
	for _, g := range geoms {
		g.oh = (g.h+g.pt+g.pb-((g.kh-1)*g.dh+1))/g.sh + 1
		g.ow = (g.w+g.pl+g.pr-((g.kw-1)*g.dw+1))/g.sw + 1
		c := 3
		x := convRandArr(rng, c*g.h*g.w).data
		col := make([]float64, c*g.kh*g.kw*g.oh*g.ow)
		convIm2col(&g, c, x, col)
		cv := convRandArr(rng, len(col)).data
		dx := make([]float64, len(x))
		convCol2im(&g, c, cv, dx)
		var lhs, rhs float64
		for i := range col {
			lhs += col[i] * cv[i]
		}
		for i := range x {
			rhs += x[i] * dx[i]
		}
		// adjoint identity, exact up to float64 rounding
		require.InDelta(t, lhs, rhs, 1e-12*math.Max(1, math.Abs(lhs)))
	}
}

func TestConvResolvePads(t *testing.T) {
	// ONNX Conv/MaxPool auto_pad doc: SAME_* makes out = ⌈in/stride⌉ with
	// total pad (out−1)·s + (k−1)·d + 1 − in, the odd one at the end for
	// SAME_UPPER and at the beginning for SAME_LOWER. Closed form for
	// in = 5, k = 2, s = 1: total 1.
	p, err := ResolvePads("SAME_UPPER", []int{5, 5}, []int{2, 2}, nil, nil, nil)
	require.NoError(t, err)
	require.Equal(t, []int{0, 0, 1, 1}, p)
	p, err = ResolvePads("SAME_LOWER", []int{5, 5}, []int{2, 2}, nil, nil, nil)
	require.NoError(t, err)
	require.Equal(t, []int{1, 1, 0, 0}, p)
	// in = 7, k = 3, s = 2: out 4, total (4−1)·2 + 3 − 7 = 2 (closed form above)
	p, err = ResolvePads("SAME_UPPER", []int{7}, []int{3}, []int{2}, nil, nil)
	require.NoError(t, err)
	require.Equal(t, []int{1, 1}, p)
	// dilation 2 widens the window to (k−1)·d + 1 = 5: total 4 at s = 1 (closed form above)
	p, err = ResolvePads("SAME_LOWER", []int{6}, []int{3}, nil, []int{2}, nil)
	require.NoError(t, err)
	require.Equal(t, []int{2, 2}, p)
	p, err = ResolvePads("VALID", []int{6}, []int{3}, nil, nil, []int{4, 4})
	require.NoError(t, err)
	require.Equal(t, []int{0, 0}, p)
	p, err = ResolvePads("NOTSET", []int{6}, []int{3}, nil, nil, []int{4, 1})
	require.NoError(t, err)
	require.Equal(t, []int{4, 1}, p)

	_, err = ResolvePads("SAME", []int{6}, []int{3}, nil, nil, nil)
	require.ErrorIs(t, err, ErrShape)
	_, err = ResolvePads("NOTSET", []int{6}, []int{3}, nil, nil, []int{1})
	require.ErrorIs(t, err, ErrShape)
	_, err = ResolvePads("SAME_UPPER", []int{6}, []int{3}, []int{0}, nil, nil)
	require.ErrorIs(t, err, ErrShape)
}

func TestConvPoolOutSize(t *testing.T) {
	// ONNX MaxPool doc, output_spatial_shape:
	// floor: ⌊(in + pads − ((k−1)·d + 1)) / s⌋ + 1, ceil: ⌈…⌉ + 1.
	// in = 4, k = 3, s = 2: floor ⌊1/2⌋+1 = 1, ceil ⌈1/2⌉+1 = 2 (test_maxpool_2d_ceil shapes).
	o, err := poolOutSize([]int{4, 4}, []int{3, 3}, nil, []int{2, 2}, nil, false)
	require.NoError(t, err)
	require.Equal(t, []int{1, 1}, o)
	o, err = poolOutSize([]int{4, 4}, []int{3, 3}, nil, []int{2, 2}, nil, true)
	require.NoError(t, err)
	require.Equal(t, []int{2, 2}, o)
	// A last window that would start in the end padding is dropped
	// (onnxruntime ComputeOutputSize): in = 5, k = 2, s = 2, pads (0, 1):
	// ⌈4/2⌉+1 = 3 windows start at 0, 2, 4 < 5: all kept; with in = 4,
	// pads (0, 1): ⌈3/2⌉+1 = 3, but (3−1)·2 = 4 ≥ 4 + 0 → 2.
	o, err = poolOutSize([]int{5}, []int{2}, []int{0, 1}, []int{2}, nil, true)
	require.NoError(t, err)
	require.Equal(t, []int{3}, o)
	o, err = poolOutSize([]int{4}, []int{2}, []int{0, 1}, []int{2}, nil, true)
	require.NoError(t, err)
	require.Equal(t, []int{2}, o)

	_, err = poolOutSize([]int{2}, []int{3}, nil, nil, nil, false)
	require.ErrorIs(t, err, ErrShape)
	_, err = poolOutSize([]int{4}, []int{2, 2}, nil, nil, nil, false)
	require.ErrorIs(t, err, ErrShape)
}
