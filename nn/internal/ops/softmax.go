package ops

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
//	Softmax(x)_i    = exp(x_i - m) / Σ_j exp(x_j - m),   m = max_j x_j
//	logsoftmax(x)_i = x_i - m - log Σ_j exp(x_j - m)
//
// axis may be negative (counted from the end). The gradients are
// dL/dx = y ⊙ (g - Σ_j g_j y_j) for softmax and dL/dx = g - Softmax(x)·Σ_j g_j
// for log-softmax, along the same axis.
func Softmax(x *G.Node, axis int, log bool) (out *G.Node, err error) {
	name := "Softmax"
	if log {
		name = "LogSoftmax"
	}
	if x == nil {
		return nil, fmt.Errorf("nn: %s: nil operand", name)
	}
	dt, err := dtypeOf(name, x)
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
	op := &softmaxOp{name: name, axis: axis, log: log, dt: dt, shape: x.Shape(), t: x.Type()}
	return G.ApplyOp(op, x)
}

// softmaxOp is the forward op of softmax.
type softmaxOp struct {
	name  string
	axis  int
	log   bool
	dt    tensor.Dtype
	shape tensor.Shape
	t     hm.Type
}

func (op *softmaxOp) Arity() int           { return 1 }
func (op *softmaxOp) Type() hm.Type        { return hm.NewFnType(op.t, op.t) }
func (op *softmaxOp) ReturnsPtr() bool     { return true }
func (op *softmaxOp) CallsExtern() bool    { return false }
func (op *softmaxOp) OverwritesInput() int { return 0 }
func (op *softmaxOp) String() string       { return fmt.Sprintf("%s{axis=%d}", op.name, op.axis) }
func (op *softmaxOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.%s%d%v%v", op.name, op.axis, op.dt, op.shape)
}
func (op *softmaxOp) Hashcode() uint32 { return hashOp(op) }
func (op *softmaxOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return op.shape.Clone(), nil
}
func (op *softmaxOp) DiffWRT(int) []bool { return []bool{true} }

func (op *softmaxOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 1 {
		return nil, fmt.Errorf("nn: %s gradient: got %d inputs, want 1", op.name, len(inputs))
	}
	d, err := G.ApplyOp(&softmaxDiffOp{op}, output, grad)
	if err != nil {
		return nil, fmt.Errorf("nn: %s gradient: %w", op.name, err)
	}
	return G.Nodes{d}, nil
}

// lanes returns the sizes (outer, n, inner) that view the input as
// outer × n × inner with the softmax axis in the middle.
func (op *softmaxOp) lanes() (outer, n, inner int) {
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

func (op *softmaxOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *softmaxOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 1 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 1", op.name, len(vs))
	}
	if op.dt == tensor.Float32 {
		return softmaxRun[float32](op, p, vs[0])
	}
	return softmaxRun[float64](op, p, vs[0])
}

func softmaxRun[T float](op *softmaxOp, p, xv G.Value) (G.Value, error) {
	x, err := valuesOf[T](op.name, xv, op.shape)
	if err != nil {
		return nil, err
	}
	// A lane's max and sum are taken before any of it is written, and
	// element k is read before it is written, so y may be x.
	v, y := allocOutput[T](p, op.dt, op.shape, []span{spanOf(x)})
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
	return wrap(v, y), nil
}

// softmaxDiffOp computes dL/dx from (y, dL/dy).
type softmaxDiffOp struct{ *softmaxOp }

func (op *softmaxDiffOp) Arity() int           { return 2 }
func (op *softmaxDiffOp) OverwritesInput() int { return 1 }
func (op *softmaxDiffOp) Type() hm.Type        { return hm.NewFnType(op.t, op.t, op.t) }
func (op *softmaxDiffOp) String() string       { return "∂" + op.softmaxOp.String() }
func (op *softmaxDiffOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.d%s%d%v%v", op.name, op.axis, op.dt, op.shape)
}
func (op *softmaxDiffOp) Hashcode() uint32 { return hashOp(op) }
func (op *softmaxDiffOp) Do(vs ...G.Value) (G.Value, error) {
	return op.UsePreallocDo(nil, vs...)
}

func (op *softmaxDiffOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 2", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return softmaxDiffRun[float32](op, p, vs)
	}
	return softmaxDiffRun[float64](op, p, vs)
}

func softmaxDiffRun[T float](op *softmaxDiffOp, p G.Value, vs []G.Value) (G.Value, error) {
	y, err := valuesOf[T](op.name, vs[0], op.shape)
	if err != nil {
		return nil, err
	}
	g, err := valuesOf[T](op.name, vs[1], op.shape)
	if err != nil {
		return nil, err
	}
	// Each lane is summed before it is written, and lanes are disjoint, so
	// the output may share a buffer with y or g.
	v, d := allocOutput[T](p, op.dt, op.shape, []span{spanOf(y), spanOf(g)})
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
	return wrap(v, d), nil
}
