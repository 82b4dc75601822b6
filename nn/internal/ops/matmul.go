package ops

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"encoding/binary"
	"fmt"
	"hash"
	"hash/fnv"
	"math"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas64"
)

// matMulOp multiplies op(A)·op(B) for rank-2 operands, or batch by batch
// for rank-3 operands with equal leading dimensions, where op transposes the
// last two axes when the flag is set. gorgonia's own Mul treats shapes such as
// (1, k) as vectors and changes the result's rank, so the network uses this
// op for every ONNX MatMul and Gemm.
//
// For Gemm it computes Y = alpha·op(A)·op(B) + bias: the bias row
// is constant, so it has no gradient, and the gradients carry the same alpha.
//
// Gradients (matrix calculus, e.g. Petersen & Pedersen, The Matrix Cookbook,
// 2012, eq. 69–70): for C = A·B, ∂L/∂A = ∂L/∂C·Bᵀ and ∂L/∂B = Aᵀ·∂L/∂C; the
// transposed variants follow by transposing both sides.
type matMulOp struct {
	transA, transB bool
	rank           int
	// fixedA and fixedB mark operands no runtime input reaches (see
	// fixed): their gradients are never built.
	fixedA, fixedB bool
	// alpha scales the product: the op computes alpha·op(A)·op(B) (+ bias).
	alpha float64
	// bias, when not nil, is a constant row added to every output row
	// (ONNX Gemm's beta·C for a C that broadcasts along the rows): the
	// output starts as bias and the product accumulates onto it, so no
	// separate Add runs forward or backward.
	bias *biasRow
	// pack caches op(B) packed for the float32 GEMM when B is fixed (a
	// weight): packed on the first run, reused on every later one. Each
	// machine builds its own graph, so one op instance, and its cache, is
	// never used by two goroutines at once.
	pack *matMulPack
	// relu applies max(v, 0) to every output value after the bias, and
	// masks the incoming gradient with the output.
	relu bool
}

// biasRow is the row beta·C of a fused Gemm in both element types, with a
// hash of its bits so that ops with different biases never compare equal.
type biasRow struct {
	f64  []float64
	f32  []float32
	hash uint64
}

// matMulPack is the packed fixed B of one matMulOp instance and the
// tensor data it was packed from.
type matMulPack struct {
	src *float32
	pb  *sgemmPrepacked
}

// MatMul applies op(A)·op(B) to rank-2 operands, or batch by batch to
// rank-3 operands with equal leading dimensions.
func MatMul(a, b *G.Node, transA, transB bool) (*G.Node, error) {
	return Gemm(a, b, transA, transB, 1, nil, false)
}

// Gemm applies alpha·op(A)·op(B) + bias, bias a row of the output's width
// (nil for none) added to every row, which needs rank-2 operands; with relu
// it then applies max(v, 0) to every output value in the same op.
func Gemm(a, b *G.Node, transA, transB bool, alpha float64, bias []float64, relu bool) (*G.Node, error) {
	if a.Dims() != b.Dims() || (a.Dims() != 2 && a.Dims() != 3) {
		return nil, fmt.Errorf("matmul: operands must both be rank 2 or rank 3, got %v and %v", a.Shape(), b.Shape())
	}
	if a.Dtype() != b.Dtype() {
		return nil, fmt.Errorf("matmul: operand types differ: %v and %v", a.Dtype(), b.Dtype())
	}
	op := matMulOp{transA: transA, transB: transB, rank: a.Dims(), fixedA: fixed(a), fixedB: fixed(b), alpha: alpha, relu: relu}
	if bias != nil {
		if op.rank != 2 {
			return nil, fmt.Errorf("matmul: a bias row needs rank-2 operands, got %v and %v", a.Shape(), b.Shape())
		}
		n := b.Shape()[1]
		if transB {
			n = b.Shape()[0]
		}
		if len(bias) != n {
			return nil, fmt.Errorf("matmul: bias has %d values, the product %d columns", len(bias), n)
		}
		cb := &biasRow{f64: append([]float64(nil), bias...), f32: make([]float32, n)}
		h := fnv.New64a()
		var w [8]byte
		for i, v := range bias {
			cb.f32[i] = float32(v)
			binary.LittleEndian.PutUint64(w[:], math.Float64bits(v))
			h.Write(w[:])
		}
		cb.hash = h.Sum64()
		op.bias = cb
	}
	if op.fixedB && op.rank == 2 {
		op.pack = &matMulPack{}
	}
	return G.ApplyOp(op, a, b)
}

func (op matMulOp) Arity() int { return 2 }

func (op matMulOp) Type() hm.Type {
	a := hm.TypeVariable('a')
	t := G.TensorType{Dims: op.rank, Of: a}
	return hm.NewFnType(t, t, t)
}

func (op matMulOp) dims(a, b tensor.Shape) (batch, m, k, n int, err error) {
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

func (op matMulOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
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

func (op matMulOp) Do(vals ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vals...) }

// UsePreallocDo writes the product into prealloc when writable allows it,
// and into a new tensor otherwise; with a fitting prealloc and a warm cache
// it allocates nothing. The inputs are only read.
func (op matMulOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (G.Value, error) {
	if len(vals) != 2 {
		return nil, fmt.Errorf("matmul: expected 2 inputs, got %d", len(vals))
	}
	a, ok1 := vals[0].(*tensor.Dense)
	b, ok2 := vals[1].(*tensor.Dense)
	if !ok1 || !ok2 {
		return nil, fmt.Errorf("matmul: inputs must be dense tensors, got %T and %T", vals[0], vals[1])
	}
	if a.Dtype() != b.Dtype() {
		return nil, fmt.Errorf("matmul: operand types differ: %v and %v", a.Dtype(), b.Dtype())
	}
	batch, m, k, n, err := op.dims(a.Shape(), b.Shape())
	if err != nil {
		return nil, err
	}
	if op.bias != nil && (batch != 1 || len(op.bias.f64) != n) {
		return nil, fmt.Errorf("matmul: bias of %d values for a product of %d columns", len(op.bias.f64), n)
	}
	// Stored (row-major) column counts of one batch slice of A and B.
	colsA, colsB := k, n
	if op.transA {
		colsA = m
	}
	if op.transB {
		colsB = k
	}
	shp := [3]int{m, n}
	shape := shp[:2]
	if op.rank == 3 {
		shp = [3]int{batch, m, n}
		shape = shp[:3]
	}
	reuse := writable(prealloc, a.Dtype(), shape, nil, denseSpan(a), denseSpan(b))
	switch a.Dtype() {
	case tensor.Float64:
		ad, bd := contiguous64(a), contiguous64(b)
		var out []float64
		if reuse != nil {
			out = reuse.Float64s()
		} else {
			out = make([]float64, batch*m*n)
		}
		ta, tb := blas.NoTrans, blas.NoTrans
		if op.transA {
			ta = blas.Trans
		}
		if op.transB {
			tb = blas.Trans
		}
		beta := 0.0
		if op.bias != nil {
			for i := 0; i < m; i++ {
				copy(out[i*n:(i+1)*n], op.bias.f64)
			}
			beta = 1
		} else if k == 0 {
			clear(out)
		}
		for i := 0; i < batch; i++ {
			am := blas64.General{Rows: len(ad) / batch / colsA, Cols: colsA, Stride: colsA, Data: ad[i*m*k : (i+1)*m*k]}
			bm := blas64.General{Rows: len(bd) / batch / colsB, Cols: colsB, Stride: colsB, Data: bd[i*k*n : (i+1)*k*n]}
			cm := blas64.General{Rows: m, Cols: n, Stride: n, Data: out[i*m*n : (i+1)*m*n]}
			if m > 0 && n > 0 && k > 0 {
				blas64.Gemm(ta, tb, op.scale(), am, bm, beta, cm)
			}
		}
		return matMulResult(op, op.relu, reuse, batch, m, n, out), nil
	case tensor.Float32:
		ad, bd := contiguous32(a), contiguous32(b)
		var out []float32
		if reuse != nil {
			out = reuse.Float32s()
		} else {
			out = make([]float32, batch*m*n)
		}
		alpha := float32(op.scale())
		pb := op.packed(bd, n, k)
		var bias []float32
		if op.bias != nil {
			bias = op.bias.f32
		}
		for i := 0; i < batch; i++ {
			denseProduct32(op.transA, m, n, k, alpha, ad[i*m*k:(i+1)*m*k], colsA, pb, op.transB, bd[i*k*n:(i+1)*k*n], colsB, bias, op.relu, out[i*m*n:(i+1)*m*n])
		}
		return matMulResult(op, false, reuse, batch, m, n, out), nil
	}
	return nil, fmt.Errorf("matmul: unsupported element type %v", a.Dtype())
}

// scale is alpha, 1 for ops built without one.
func (op matMulOp) scale() float64 {
	if op.alpha == 0 {
		return 1
	}
	return op.alpha
}

// packed returns the prepacked op(B) for sgemmPre when B is fixed, nil when
// it is not or the CPU has no packed kernel. The layouts are made from the
// first run's B; a fixed node's values never change, but B arriving in a
// new backing array (a rebound constant) starts a new cache.
func (op matMulOp) packed(bd []float32, n, k int) *sgemmPrepacked {
	c := op.pack
	if c == nil || len(bd) == 0 {
		return nil
	}
	if c.pb == nil || c.src != &bd[0] || c.pb.n != n || c.pb.k != k {
		c.pb = newSgemmPrepacked(op.transB, n, k)
		c.src = &bd[0]
	}
	return c.pb
}

// matMulResult applies the fused Relu to data when applyRelu (the op has
// one that the product has not applied yet), and returns reuse, or a new tensor
// backed by data when reuse is nil: the conversion of data to an
// interface, which allocates, happens only then.
func matMulResult[T float32 | float64](op matMulOp, applyRelu bool, reuse *tensor.Dense, batch, m, n int, data []T) *tensor.Dense {
	if applyRelu {
		switch d := any(data).(type) {
		case []float32:
			f32.Relu(d, d)
		case []float64:
			relu(d, d)
		}
	}
	if reuse != nil {
		return reuse
	}
	shape := []int{m, n}
	if op.rank == 3 {
		shape = []int{batch, m, n}
	}
	return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(data))
}

// contiguous64 returns the elements of t in row-major order.
func contiguous64(t *tensor.Dense) []float64 {
	if t.RequiresIterator() {
		c := t.Materialize().(*tensor.Dense)
		return c.Float64s()
	}
	return t.Float64s()
}

func contiguous32(t *tensor.Dense) []float32 {
	if t.RequiresIterator() {
		c := t.Materialize().(*tensor.Dense)
		return c.Float32s()
	}
	return t.Float32s()
}

func (op matMulOp) ReturnsPtr() bool     { return false }
func (op matMulOp) CallsExtern() bool    { return false }
func (op matMulOp) OverwritesInput() int { return -1 }
func (op matMulOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "MatMul{%v,%v,%d,%v,%v,%v", op.transA, op.transB, op.rank, op.fixedA, op.fixedB, op.scale())
	if op.bias != nil {
		fmt.Fprintf(h, ",bias %d %x", len(op.bias.f64), op.bias.hash)
	}
	fmt.Fprint(h, "}")
}
func (op matMulOp) Hashcode() uint32 { return hashOp(op) }
func (op matMulOp) String() string {
	if op.relu {
		return fmt.Sprintf("MatMul{transA=%v, transB=%v, alpha=%v, bias=%v, relu}", op.transA, op.transB, op.scale(), op.bias != nil)
	}
	if op.bias != nil || op.scale() != 1 {
		return fmt.Sprintf("MatMul{transA=%v, transB=%v, alpha=%v, bias=%v}", op.transA, op.transB, op.scale(), op.bias != nil)
	}
	return fmt.Sprintf("MatMul{transA=%v, transB=%v}", op.transA, op.transB)
}

func (op matMulOp) DiffWRT(inputs int) []bool { return []bool{!op.fixedA, !op.fixedB} }

func (op matMulOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 2 {
		return nil, fmt.Errorf("matmul: expected 2 inputs, got %d", len(inputs))
	}
	a, b := inputs[0], inputs[1]
	var da, db *G.Node
	var err error
	if op.relu {
		// ∂L/∂v = ∂L/∂y where y > 0: the mask of the Relu this op applies.
		if grad, err = reluGrad(output, grad); err != nil {
			return nil, fmt.Errorf("matmul gradient: %w", err)
		}
	}
	// mul builds one gradient product unless its operand is fixed.
	mul := func(fixed bool, x, y *G.Node, tx, ty bool) (*G.Node, error) {
		if fixed {
			return nil, nil
		}
		return Gemm(x, y, tx, ty, op.scale(), nil, false)
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
