package ops

import (
	"fmt"

	"github.com/apportion/apportion/nn/internal/asm/f32"
)

// Weights is the constant operand B of float32 products C = A·op(B): a
// dense layer's weight matrix, op(B) k×n, stored in b with row stride ldb
// (transposed when tB). Its kernel layouts are made when it is built, so
// one Weights serves many goroutines at once.
type Weights struct {
	tB   bool
	n, k int
	b    []float32
	ldb  int
	pb   *sgemmPrepacked // nil: the CPU has no packed kernel
}

// NewWeights returns op(B) = B (k×n, row stride n) or, with tB, Bᵀ (B n×k,
// row stride k), read from b, which must not change afterwards.
func NewWeights(tB bool, n, k int, b []float32) *Weights {
	ldb := n
	if tB {
		ldb = k
	}
	if len(b) < k*n {
		panic(fmt.Sprintf("nn: weights: %d values for a %d×%d matrix", len(b), k, n))
	}
	w := &Weights{tB: tB, n: n, k: k, b: b, ldb: ldb, pb: newSgemmPrepacked(tB, n, k)}
	if w.pb != nil {
		w.pb.panelsOf(b, ldb)
		if tB {
			w.pb.rowsOf(b, ldb)
		}
	}
	return w
}

// Product computes C = alpha·A·op(B) + bias (bias a row of n values added
// to every row, nil for none), then max(v, 0) on every value when relu,
// for the m rows of A (row stride lda) into C (row stride n). Each
// element has the bits the network's Gemm op gives it (the same function
// computes both), whatever m is: a row's result does not depend on the
// rows around it.
func (w *Weights) Product(m int, alpha float32, a []float32, lda int, bias []float32, relu bool, c []float32) {
	if bias != nil && len(bias) != w.n {
		panic(fmt.Sprintf("nn: weights: bias of %d values for %d columns", len(bias), w.n))
	}
	denseProduct32(false, m, w.n, w.k, alpha, a, lda, w.pb, w.tB, w.b, w.ldb, bias, relu, c)
}

// denseProduct32 is the float32 product of the Gemm op: C = alpha·op(A)·
// op(B) + bias (C m×n, row stride n; bias nil for none), then max(v, 0)
// when relu. pb is op(B) prepacked, or nil. Dense layers (alpha 1, A not
// transposed, a bias or a Relu) store their tiles with both applied
// (sgemmPreEpilogue); the other products fill C with the bias, accumulate
// onto it and apply f32.Relu after, which rounds the same.
func denseProduct32(tA bool, m, n, k int, alpha float32, a []float32, lda int, pb *sgemmPrepacked, tB bool, b []float32, ldb int, bias []float32, relu bool, c []float32) {
	if pb != nil && alpha == 1 && !tA && (bias != nil || relu) && sgemmEpilogueFits(m, n, k) {
		sgemmPreEpilogue(m, n, k, a, lda, pb, b, ldb, bias, relu, c, n)
		return
	}
	c = c[:m*n]
	var beta float32
	if bias != nil {
		for i := 0; i < m; i++ {
			copy(c[i*n:(i+1)*n], bias)
		}
		beta = 1
	} else if k == 0 {
		clear(c)
	}
	switch {
	case m == 0 || n == 0 || k == 0:
	case pb != nil:
		sgemmPre(tA, m, n, k, alpha, a, lda, pb, b, ldb, beta, c, n)
	default:
		sgemm(tA, tB, m, n, k, alpha, a, lda, b, ldb, beta, c, n)
	}
	if relu {
		f32.Relu(c, c)
	}
}
