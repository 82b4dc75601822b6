package nn

import (
	"fmt"
	"hash"
	"hash/fnv"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas64"
)

// coreMatMulOp multiplies op(A)·op(B) for rank-2 operands, or batch by batch
// for rank-3 operands with equal leading dimensions, where op transposes the
// last two axes when the flag is set. gorgonia's own Mul treats shapes such as
// (1, k) as vectors and changes the result's rank, so the network uses this
// op for every ONNX MatMul and Gemm.
//
// Gradients (matrix calculus, e.g. Petersen & Pedersen, The Matrix Cookbook,
// 2012, eq. 69–70): for C = A·B, ∂L/∂A = ∂L/∂C·Bᵀ and ∂L/∂B = Aᵀ·∂L/∂C; the
// transposed variants follow by transposing both sides.
type coreMatMulOp struct {
	transA, transB bool
	rank           int
	// fixedA and fixedB mark operands no runtime input reaches (see
	// coreFixed): their gradients are never built.
	fixedA, fixedB bool
}

func coreMatMul(a, b *G.Node, transA, transB bool) (*G.Node, error) {
	if a.Dims() != b.Dims() || (a.Dims() != 2 && a.Dims() != 3) {
		return nil, fmt.Errorf("matmul: operands must both be rank 2 or rank 3, got %v and %v", a.Shape(), b.Shape())
	}
	if a.Dtype() != b.Dtype() {
		return nil, fmt.Errorf("matmul: operand types differ: %v and %v", a.Dtype(), b.Dtype())
	}
	return G.ApplyOp(coreMatMulOp{transA: transA, transB: transB, rank: a.Dims(), fixedA: coreFixed(a), fixedB: coreFixed(b)}, a, b)
}

func (op coreMatMulOp) Arity() int { return 2 }

func (op coreMatMulOp) Type() hm.Type {
	a := hm.TypeVariable('a')
	t := G.TensorType{Dims: op.rank, Of: a}
	return hm.NewFnType(t, t, t)
}

func (op coreMatMulOp) dims(a, b tensor.Shape) (batch, m, k, n int, err error) {
	if len(a) != op.rank || len(b) != op.rank {
		return 0, 0, 0, 0, fmt.Errorf("matmul: expected rank %d operands, got %v and %v", op.rank, a, b)
	}
	r := op.rank
	batch = 1
	if r == 3 {
		if a[0] != b[0] {
			return 0, 0, 0, 0, fmt.Errorf("matmul: batch sizes differ: %v and %v", a, b)
		}
		batch = a[0]
	}
	m, k = a[r-2], a[r-1]
	if op.transA {
		m, k = k, m
	}
	k2, n := b[r-2], b[r-1]
	if op.transB {
		k2, n = n, k2
	}
	if k != k2 {
		return 0, 0, 0, 0, fmt.Errorf("matmul: inner dimensions differ: %v and %v (transA %v, transB %v)", a, b, op.transA, op.transB)
	}
	return batch, m, k, n, nil
}

func (op coreMatMulOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) != 2 {
		return nil, fmt.Errorf("matmul: expected 2 inputs, got %d", len(in))
	}
	a, ok1 := in[0].(tensor.Shape)
	b, ok2 := in[1].(tensor.Shape)
	if !ok1 || !ok2 {
		return nil, fmt.Errorf("matmul: inputs have no shapes")
	}
	batch, m, _, n, err := op.dims(a, b)
	if err != nil {
		return nil, err
	}
	if op.rank == 3 {
		return tensor.Shape{batch, m, n}, nil
	}
	return tensor.Shape{m, n}, nil
}

func (op coreMatMulOp) Do(vals ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vals...) }

// UsePreallocDo writes the product into prealloc when it is a dense tensor
// of the right type and size (the tape machine reuses it across runs), and
// into a new tensor otherwise.
func (op coreMatMulOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (G.Value, error) {
	if len(vals) != 2 {
		return nil, fmt.Errorf("matmul: expected 2 inputs, got %d", len(vals))
	}
	a, ok1 := vals[0].(*tensor.Dense)
	b, ok2 := vals[1].(*tensor.Dense)
	if !ok1 || !ok2 {
		return nil, fmt.Errorf("matmul: inputs must be dense tensors, got %T and %T", vals[0], vals[1])
	}
	batch, m, k, n, err := op.dims(a.Shape(), b.Shape())
	if err != nil {
		return nil, err
	}
	shape := []int{m, n}
	if op.rank == 3 {
		shape = []int{batch, m, n}
	}
	ta, tb := blas.NoTrans, blas.NoTrans
	if op.transA {
		ta = blas.Trans
	}
	if op.transB {
		tb = blas.Trans
	}
	// Stored (row-major) column counts of one batch slice of A and B.
	colsA, colsB := k, n
	if op.transA {
		colsA = m
	}
	if op.transB {
		colsB = k
	}
	reuse, _ := prealloc.(*tensor.Dense)
	if reuse != nil && (reuse.Dtype() != a.Dtype() || reuse.Size() != batch*m*n || reuse.RequiresIterator()) {
		reuse = nil
	}
	switch a.Dtype() {
	case tensor.Float64:
		ad, bd := coreContiguous64(a), coreContiguous64(b)
		var out []float64
		if reuse != nil {
			out = reuse.Float64s()
		} else {
			out = make([]float64, batch*m*n)
		}
		for i := 0; i < batch; i++ {
			am := blas64.General{Rows: len(ad) / batch / colsA, Cols: colsA, Stride: colsA, Data: ad[i*m*k : (i+1)*m*k]}
			bm := blas64.General{Rows: len(bd) / batch / colsB, Cols: colsB, Stride: colsB, Data: bd[i*k*n : (i+1)*k*n]}
			cm := blas64.General{Rows: m, Cols: n, Stride: n, Data: out[i*m*n : (i+1)*m*n]}
			if m > 0 && n > 0 && k > 0 {
				blas64.Gemm(ta, tb, 1, am, bm, 0, cm)
			}
		}
		return coreResult(reuse, shape, out), nil
	case tensor.Float32:
		ad, bd := coreContiguous32(a), coreContiguous32(b)
		var out []float32
		if reuse != nil {
			out = reuse.Float32s()
		} else {
			out = make([]float32, batch*m*n)
		}
		for i := 0; i < batch; i++ {
			if m > 0 && n > 0 && k > 0 {
				sgemm(op.transA, op.transB, m, n, k, 1, ad[i*m*k:(i+1)*m*k], colsA, bd[i*k*n:(i+1)*k*n], colsB, 0, out[i*m*n:(i+1)*m*n], n)
			}
		}
		return coreResult(reuse, shape, out), nil
	}
	return nil, fmt.Errorf("matmul: unsupported element type %v", a.Dtype())
}

// coreResult returns reuse reshaped to shape, or a new tensor backed by data.
func coreResult(reuse *tensor.Dense, shape []int, data any) *tensor.Dense {
	if reuse != nil {
		if !reuse.Shape().Eq(tensor.Shape(shape)) {
			if err := reuse.Reshape(shape...); err == nil {
				return reuse
			}
		} else {
			return reuse
		}
	}
	return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(data))
}

// coreContiguous64 returns the elements of t in row-major order.
func coreContiguous64(t *tensor.Dense) []float64 {
	if t.RequiresIterator() {
		c := t.Materialize().(*tensor.Dense)
		return c.Float64s()
	}
	return t.Float64s()
}

func coreContiguous32(t *tensor.Dense) []float32 {
	if t.RequiresIterator() {
		c := t.Materialize().(*tensor.Dense)
		return c.Float32s()
	}
	return t.Float32s()
}

func (op coreMatMulOp) ReturnsPtr() bool     { return false }
func (op coreMatMulOp) CallsExtern() bool    { return false }
func (op coreMatMulOp) OverwritesInput() int { return -1 }
func (op coreMatMulOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "coreMatMul{%v,%v,%d,%v,%v}", op.transA, op.transB, op.rank, op.fixedA, op.fixedB)
}
func (op coreMatMulOp) Hashcode() uint32 {
	h := fnv.New32a()
	op.WriteHash(h)
	return h.Sum32()
}
func (op coreMatMulOp) String() string {
	return fmt.Sprintf("coreMatMul{transA=%v, transB=%v}", op.transA, op.transB)
}

func (op coreMatMulOp) DiffWRT(inputs int) []bool { return []bool{!op.fixedA, !op.fixedB} }

func (op coreMatMulOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 2 {
		return nil, fmt.Errorf("matmul: expected 2 inputs, got %d", len(inputs))
	}
	a, b := inputs[0], inputs[1]
	var da, db *G.Node
	var err error
	// mul builds one gradient product unless its operand is fixed.
	mul := func(fixed bool, x, y *G.Node, tx, ty bool) (*G.Node, error) {
		if fixed {
			return nil, nil
		}
		return coreMatMul(x, y, tx, ty)
	}
	switch {
	case !op.transA && !op.transB: // C = A·B
		if da, err = mul(op.fixedA, grad, b, false, true); err != nil {
			return nil, err
		}
		db, err = mul(op.fixedB, a, grad, true, false)
	case op.transA && !op.transB: // C = Aᵀ·B
		if da, err = mul(op.fixedA, b, grad, false, true); err != nil {
			return nil, err
		}
		db, err = mul(op.fixedB, a, grad, false, false)
	case !op.transA && op.transB: // C = A·Bᵀ
		if da, err = mul(op.fixedA, grad, b, false, false); err != nil {
			return nil, err
		}
		db, err = mul(op.fixedB, grad, a, true, false)
	default: // C = Aᵀ·Bᵀ
		if da, err = mul(op.fixedA, b, grad, true, true); err != nil {
			return nil, err
		}
		db, err = mul(op.fixedB, grad, a, true, true)
	}
	if err != nil {
		return nil, err
	}
	return G.Nodes{da, db}, nil
}
