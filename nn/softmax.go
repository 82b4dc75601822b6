package nn

import (
	"fmt"
	"hash"
	"math"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// softmax applies ONNX Softmax-13 (log false) or LogSoftmax-13 (log true)
// along one axis, numerically stable (subtract the max):
//
//	softmax(x)_i    = exp(x_i - m) / Σ_j exp(x_j - m),   m = max_j x_j
//	logsoftmax(x)_i = x_i - m - log Σ_j exp(x_j - m)
//
// axis may be negative (counted from the end). The gradients are
// dL/dx = y ⊙ (g - Σ_j g_j y_j) for softmax and dL/dx = g - softmax(x)·Σ_j g_j
// for log-softmax, along the same axis.
func softmax(x *G.Node, axis int, log bool) (out *G.Node, err error) {
	name := "Softmax"
	if log {
		name = "LogSoftmax"
	}
	if x == nil {
		return nil, fmt.Errorf("nn: %s: nil operand", name)
	}
	dt, err := elemDtype(name, x)
	if err != nil {
		return nil, err
	}
	shape := []int(x.Shape())
	r := len(shape)
	if axis < -r || axis >= r || r == 0 {
		return nil, fmt.Errorf("nn: %s: axis %d out of range for input of shape %v (want -%d..%d)", name, axis, shape, r, r-1)
	}
	if axis < 0 {
		axis += r
	}
	defer elemRecover(name, &err)
	op := &elemSoftmaxOp{name: name, axis: axis, log: log, dt: dt, shape: x.Shape(), t: x.Type()}
	return G.ApplyOp(op, x)
}

// elemSoftmaxOp is the forward op of softmax.
type elemSoftmaxOp struct {
	name  string
	axis  int
	log   bool
	dt    tensor.Dtype
	shape tensor.Shape
	t     hm.Type
}

func (op *elemSoftmaxOp) Arity() int           { return 1 }
func (op *elemSoftmaxOp) Type() hm.Type        { return hm.NewFnType(op.t, op.t) }
func (op *elemSoftmaxOp) ReturnsPtr() bool     { return true }
func (op *elemSoftmaxOp) CallsExtern() bool    { return false }
func (op *elemSoftmaxOp) OverwritesInput() int { return 0 }
func (op *elemSoftmaxOp) String() string       { return fmt.Sprintf("%s{axis=%d}", op.name, op.axis) }
func (op *elemSoftmaxOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.%s%d%v%v", op.name, op.axis, op.dt, op.shape)
}
func (op *elemSoftmaxOp) Hashcode() uint32 { return elemHash(op) }
func (op *elemSoftmaxOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return op.shape.Clone(), nil
}
func (op *elemSoftmaxOp) DiffWRT(int) []bool { return []bool{true} }

func (op *elemSoftmaxOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 1 {
		return nil, fmt.Errorf("nn: %s gradient: got %d inputs, want 1", op.name, len(inputs))
	}
	d, err := G.ApplyOp(&elemSoftmaxDiffOp{op}, output, grad)
	if err != nil {
		return nil, fmt.Errorf("nn: %s gradient: %w", op.name, err)
	}
	return G.Nodes{d}, nil
}

// lanes returns the sizes (outer, n, inner) that view the input as
// outer × n × inner with the softmax axis in the middle.
func (op *elemSoftmaxOp) lanes() (outer, n, inner int) {
	outer, inner = 1, 1
	for i, d := range op.shape {
		switch {
		case i < op.axis:
			outer *= d
		case i > op.axis:
			inner *= d
		}
	}
	return outer, op.shape[op.axis], inner
}

func (op *elemSoftmaxOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *elemSoftmaxOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 1 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 1", op.name, len(vs))
	}
	if op.dt == tensor.Float32 {
		return elemSoftmaxRun[float32](op, p, vs[0])
	}
	return elemSoftmaxRun[float64](op, p, vs[0])
}

func elemSoftmaxRun[T elemFloat](op *elemSoftmaxOp, p, xv G.Value) (G.Value, error) {
	x, err := elemData[T](op.name, xv, op.shape)
	if err != nil {
		return nil, err
	}
	// A lane's max and sum are taken before any of it is written, and
	// element k is read before it is written, so y may be x.
	v, y := elemAlloc[T](p, op.dt, op.shape)
	outer, n, inner := op.lanes()
	for o := 0; o < outer; o++ {
		for in := 0; in < inner; in++ {
			base := o*n*inner + in
			m := math.Inf(-1)
			for j := 0; j < n; j++ {
				m = math.Max(m, float64(x[base+j*inner]))
			}
			var s float64
			for j := 0; j < n; j++ {
				s += math.Exp(float64(x[base+j*inner]) - m)
			}
			if op.log {
				ls := m + math.Log(s)
				for j := 0; j < n; j++ {
					y[base+j*inner] = T(float64(x[base+j*inner]) - ls)
				}
				continue
			}
			for j := 0; j < n; j++ {
				y[base+j*inner] = T(math.Exp(float64(x[base+j*inner])-m) / s)
			}
		}
	}
	return elemWrap(v, y), nil
}

// elemSoftmaxDiffOp computes dL/dx from (y, dL/dy).
type elemSoftmaxDiffOp struct{ *elemSoftmaxOp }

func (op *elemSoftmaxDiffOp) Arity() int           { return 2 }
func (op *elemSoftmaxDiffOp) OverwritesInput() int { return 1 }
func (op *elemSoftmaxDiffOp) Type() hm.Type        { return hm.NewFnType(op.t, op.t, op.t) }
func (op *elemSoftmaxDiffOp) String() string       { return "∂" + op.elemSoftmaxOp.String() }
func (op *elemSoftmaxDiffOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.d%s%d%v%v", op.name, op.axis, op.dt, op.shape)
}
func (op *elemSoftmaxDiffOp) Hashcode() uint32 { return elemHash(op) }
func (op *elemSoftmaxDiffOp) Do(vs ...G.Value) (G.Value, error) {
	return op.UsePreallocDo(nil, vs...)
}

func (op *elemSoftmaxDiffOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 2", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return elemSoftmaxDiffRun[float32](op, p, vs)
	}
	return elemSoftmaxDiffRun[float64](op, p, vs)
}

func elemSoftmaxDiffRun[T elemFloat](op *elemSoftmaxDiffOp, p G.Value, vs []G.Value) (G.Value, error) {
	y, err := elemData[T](op.name, vs[0], op.shape)
	if err != nil {
		return nil, err
	}
	g, err := elemData[T](op.name, vs[1], op.shape)
	if err != nil {
		return nil, err
	}
	// Each lane is summed before it is written, and lanes are disjoint, so
	// the output may share a buffer with y or g.
	v, d := elemAlloc[T](p, op.dt, op.shape)
	outer, n, inner := op.lanes()
	for o := 0; o < outer; o++ {
		for in := 0; in < inner; in++ {
			base := o*n*inner + in
			var s float64
			if op.log {
				for j := 0; j < n; j++ {
					s += float64(g[base+j*inner])
				}
				for j := 0; j < n; j++ {
					k := base + j*inner
					d[k] = T(float64(g[k]) - math.Exp(float64(y[k]))*s)
				}
				continue
			}
			for j := 0; j < n; j++ {
				k := base + j*inner
				s += float64(g[k]) * float64(y[k])
			}
			for j := 0; j < n; j++ {
				k := base + j*inner
				d[k] = T(float64(y[k]) * (float64(g[k]) - s))
			}
		}
	}
	return elemWrap(v, d), nil
}
