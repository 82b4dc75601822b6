package ops

import (
	"fmt"
	"hash"
	"math"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// Normalize standardises x in rows of n consecutive elements (x's elements
// in row-major order, n dividing their count):
//
//	y = (x − μ)/√(σ² + ε),  μ and σ² the mean and the (biased) variance of the row
//
// the normalisation of LayerNormalization (Ba et al. 2016, eq. 4, over the
// trailing axes), InstanceNormalization (Ulyanov et al. 2016, eq. 2, rows
// of one channel of one sample) and GroupNormalization (Wu & He 2018,
// eq. 1–2, rows of one group of channels); the caller applies the scale and
// bias. Sums run in float64. The gradient, with x̂ = y and s = 1/√(σ² + ε):
//
//	dL/dx = s·(g − mean(g) − x̂·mean(g·x̂))   over each row.
func Normalize(x *G.Node, n int, eps float64) (*G.Node, error) {
	dt, err := dtypeOf("normalization", x)
	if err != nil {
		return nil, err
	}
	size := shapeSize(x.Shape())
	if n < 1 || size%n != 0 {
		return nil, fmt.Errorf("nn: normalization: %w: rows of %d for %d elements", ErrShape, n, size)
	}
	if !(eps >= 0) {
		return nil, fmt.Errorf("nn: normalization: epsilon %v: expected a non-negative number", eps)
	}
	op := &normOp{n: n, eps: eps, dt: dt, shape: []int(x.Shape()), t: x.Type()}
	return G.ApplyOp(op, x)
}

// normOp is the forward op of Normalize.
type normOp struct {
	n     int
	eps   float64
	dt    tensor.Dtype
	shape []int
	t     hm.Type
}

func (op *normOp) Arity() int           { return 1 }
func (op *normOp) Type() hm.Type        { return hm.NewFnType(op.t, op.t) }
func (op *normOp) ReturnsPtr() bool     { return false }
func (op *normOp) CallsExtern() bool    { return false }
func (op *normOp) OverwritesInput() int { return -1 }
func (op *normOp) String() string       { return fmt.Sprintf("Normalize{rows of %d, ε=%g}", op.n, op.eps) }
func (op *normOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "norm%d,%v%v%v", op.n, op.eps, op.dt, op.shape)
}
func (op *normOp) Hashcode() uint32 { return hashOp(op) }
func (op *normOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.shape).Clone(), nil
}
func (op *normOp) DiffWRT(int) []bool { return []bool{true} }

func (op *normOp) SymDiff(inputs G.Nodes, _, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 1 {
		return nil, fmt.Errorf("nn: normalization gradient: got %d inputs, want 1", len(inputs))
	}
	d, err := G.ApplyOp(&normDiffOp{op}, inputs[0], grad)
	if err != nil {
		return nil, fmt.Errorf("nn: normalization gradient: %w", err)
	}
	return G.Nodes{d}, nil
}

// stats returns the mean and 1/√(σ² + ε) of one row.
func (op *normOp) stats(row []float64) (mean, inv float64) {
	for _, v := range row {
		mean += v
	}
	mean /= float64(len(row))
	var ss float64
	for _, v := range row {
		ss += (v - mean) * (v - mean)
	}
	return mean, 1 / math.Sqrt(ss/float64(len(row))+op.eps)
}

func (op *normOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *normOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 1 {
		return nil, fmt.Errorf("nn: normalization: got %d inputs, want 1", len(vs))
	}
	if op.dt == tensor.Float32 {
		return normRun[float32](op, p, vs[0])
	}
	return normRun[float64](op, p, vs[0])
}

func normRun[T float](op *normOp, p, xv G.Value) (G.Value, error) {
	x, err := valuesOf[T]("normalization", xv, op.shape)
	if err != nil {
		return nil, err
	}
	v, y := allocOutput[T](p, op.dt, op.shape, nil, spanOf(x))
	row := make([]float64, op.n)
	for r := 0; r < len(x)/op.n; r++ {
		xs := x[r*op.n : (r+1)*op.n]
		for i, xi := range xs {
			row[i] = float64(xi)
		}
		mean, inv := op.stats(row)
		for i, xi := range row {
			y[r*op.n+i] = T((xi - mean) * inv)
		}
	}
	return wrap(v, y), nil
}

// normDiffOp computes dL/dx from (x, dL/dy).
type normDiffOp struct{ *normOp }

func (op *normDiffOp) Arity() int     { return 2 }
func (op *normDiffOp) Type() hm.Type  { return hm.NewFnType(op.t, op.t, op.t) }
func (op *normDiffOp) String() string { return "∂" + op.normOp.String() }
func (op *normDiffOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "dnorm%d,%v%v%v", op.n, op.eps, op.dt, op.shape)
}
func (op *normDiffOp) Hashcode() uint32   { return hashOp(op) }
func (op *normDiffOp) DiffWRT(int) []bool { return []bool{false, false} }
func (op *normDiffOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: %w", op, errSecondOrder)
}
func (op *normDiffOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *normDiffOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 2", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return normDiff[float32](op, p, vs)
	}
	return normDiff[float64](op, p, vs)
}

func normDiff[T float](op *normDiffOp, p G.Value, vs []G.Value) (G.Value, error) {
	x, err := valuesOf[T]("normalization gradient", vs[0], op.shape)
	if err != nil {
		return nil, err
	}
	g, err := valuesOf[T]("normalization gradient", vs[1], op.shape)
	if err != nil {
		return nil, err
	}
	v, d := allocOutput[T](p, op.dt, op.shape, nil, spanOf(x), spanOf(g))
	row := make([]float64, op.n)
	n := float64(op.n)
	for r := 0; r < len(x)/op.n; r++ {
		lo := r * op.n
		for i := range row {
			row[i] = float64(x[lo+i])
		}
		mean, inv := op.stats(row)
		var sg, sgx float64
		for i := range row {
			xh := (row[i] - mean) * inv
			gi := float64(g[lo+i])
			sg += gi
			sgx += gi * xh
		}
		for i := range row {
			xh := (row[i] - mean) * inv
			d[lo+i] = T(inv * (float64(g[lo+i]) - sg/n - xh*sgx/n))
		}
	}
	return wrap(v, d), nil
}
