package ops

import (
	"reflect"

	G "gorgonia.org/gorgonia"
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
