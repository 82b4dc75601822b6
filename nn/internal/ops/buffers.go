package ops

import (
	"reflect"
	"slices"
	"unsafe"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// pkgPath is the import path of this package, whose ops follow the buffer
// contract (see the package doc).
var pkgPath = reflect.TypeOf(lossOp{}).PkgPath()

// Buffered returns op as a UsePreallocDoer when it is one of this package's
// ops, which follow the buffer contract.
func Buffered(op G.Op) (G.UsePreallocDoer, bool) {
	pd, ok := op.(G.UsePreallocDoer)
	if !ok {
		return nil, false
	}
	t := reflect.TypeOf(op)
	for t.Kind() == reflect.Pointer {
		t = t.Elem()
	}
	return pd, t.PkgPath() == pkgPath
}

// InPlace returns the operand that op may write its output over, or -1:
// only the elementwise kernels of this package, which read element k of
// that operand (of the output's shape) before they write element k, and say
// so with OverwritesInput.
func InPlace(op G.Op) int {
	switch o := op.(type) {
	case *unaryOp:
		return o.OverwritesInput()
	case *unaryDiffOp:
		return o.OverwritesInput()
	case *reluDiffOp:
		return o.OverwritesInput()
	case *binaryOp:
		return o.OverwritesInput()
	case *binaryDiffOp:
		return o.OverwritesInput()
	}
	return -1
}

// span is the memory [lo, hi) that a slice or tensor occupies; a zero span
// (an empty slice, a nil tensor) occupies none.
type span struct{ lo, hi uintptr }

// spanOf returns the memory of the elements of s.
func spanOf[T any](s []T) span {
	if len(s) == 0 {
		return span{}
	}
	lo := uintptr(unsafe.Pointer(unsafe.SliceData(s)))
	return span{lo, lo + uintptr(len(s))*unsafe.Sizeof(s[0])}
}

// denseSpan returns the memory of the elements of t (none for nil).
func denseSpan(t *tensor.Dense) span {
	if t == nil || t.MemSize() == 0 {
		return span{}
	}
	return span{t.Uintptr(), t.Uintptr() + t.MemSize()}
}

// overlaps reports whether s and t share a byte.
func (s span) overlaps(t span) bool { return s.lo < t.hi && t.lo < s.hi }

// mayWrite decides whether an op may write its output into the memory out
// while it reads the memory ins and inPlace: out must share no byte with
// any of ins, and with each of inPlace either none or all of it, exactly
// (the same first byte and length). inPlace lists the operands the op reads
// in step with its writes: it reads element k (for softmax, the lane of k)
// before it writes element k of the output and none of it afterwards, so
// the output may be that operand itself, but not a part of it or a region
// that starts inside it. Every op decides with this function, through
// writable or allocOutput; it is the invariant "an op never writes an
// input" with its one exception.
func mayWrite(out span, inPlace []span, ins ...span) bool {
	for _, in := range ins {
		if out.overlaps(in) {
			return false
		}
	}
	for _, in := range inPlace {
		if out.overlaps(in) && out != in {
			return false
		}
	}
	return true
}

// writable returns p when an op may write its result, of element type dt
// and the given shape, into it: p is a contiguous dense tensor of that type
// and shape, and mayWrite allows its memory given the inputs. It returns
// nil otherwise, and the op allocates its output.
func writable(p G.Value, dt tensor.Dtype, shape []int, inPlace []span, ins ...span) *tensor.Dense {
	t, ok := p.(*tensor.Dense)
	if !ok || t == nil || t.Dtype() != dt || t.RequiresIterator() || !slices.Equal(t.Shape(), shape) || t.DataSize() != shapeSize(shape) {
		return nil
	}
	if !mayWrite(denseSpan(t), inPlace, ins...) {
		return nil
	}
	return t
}

// denseOutput returns p when writable allows an op to write its result,
// of element type dt and shape shape, into it while it reads ins (none in
// place), and a new zeroed tensor otherwise.
func denseOutput(p G.Value, dt tensor.Dtype, shape tensor.Shape, ins ...*tensor.Dense) (*tensor.Dense, error) {
	var spans [4]span
	for i, in := range ins {
		spans[i] = denseSpan(in)
	}
	if t := writable(p, dt, shape, nil, spans[:len(ins)]...); t != nil {
		return t, nil
	}
	return newDense(dt, shape.Clone())
}
