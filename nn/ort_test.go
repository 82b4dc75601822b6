package nn

import (
	"context"
	"fmt"
	"math"
	"slices"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/internal/ortdata"
	"github.com/apportion/apportion/onnxlite"
)

// ortClose is the bound the ONNX Runtime fixtures are compared with on the
// float32 engine, |got − want| ≤ 1e-5 + 1e-4·|want| (testdata/ort/README.md).
func ortClose(got, want float64) bool {
	if math.IsNaN(want) || math.IsInf(want, 0) {
		return got == want || (math.IsNaN(got) && math.IsNaN(want))
	}
	return math.Abs(got-want) <= 1e-5+1e-4*math.Abs(want)
}

// runORTCase runs one fixture on the engine dt and returns the first
// mismatch, or "".
func runORTCase(c ortdata.Case, dt DType) (string, error) {
	m, err := onnxlite.DecodeFile(c.Model(), onnxlite.DecodeOptions{})
	if err != nil {
		return "", err
	}
	nw, err := Compile(m, Options{DType: dt, Machines: 1})
	if err != nil {
		return "", err
	}
	for _, set := range c.Sets() {
		ins, outs := onnxtestdata.SetFiles(set)
		var feed []*onnxlite.Tensor
		for _, f := range ins {
			t, err := onnxlite.DecodeTensorFile(f, onnxlite.DecodeOptions{})
			if err != nil {
				return "", err
			}
			feed = append(feed, t)
		}
		got, err := nw.Forward(context.Background(), feed)
		if err != nil {
			return "", err
		}
		if len(got) != len(outs) {
			return fmt.Sprintf("%d outputs, want %d", len(got), len(outs)), nil
		}
		for i, f := range outs {
			want, err := onnxlite.DecodeTensorFile(f, onnxlite.DecodeOptions{})
			if err != nil {
				return "", err
			}
			if !slices.Equal(got[i].Shape(), want.Shape()) {
				return fmt.Sprintf("output %d: shape %v, want %v", i, got[i].Shape(), want.Shape()), nil
			}
			gv, _ := got[i].Float64s()
			wv, _ := want.Float64s()
			exact := !isFloat(want.DType)
			if exact != !isFloat(got[i].DType) {
				return fmt.Sprintf("output %d: type %v, want %v", i, got[i].DType, want.DType), nil
			}
			for k := range wv {
				if exact && gv[k] != wv[k] || !exact && !ortClose(gv[k], wv[k]) {
					return fmt.Sprintf("output %d element %d: got %v, want %v", i, k, gv[k], wv[k]), nil
				}
			}
		}
	}
	return "", nil
}

// TestORTFixtures runs every case of testdata/ort: the opset 18–26
// revisions of the supported operators, the operators added since, integer
// shape inputs, half-precision inputs and six whole models, against the
// outputs ONNX Runtime 1.30 (CPU) computed for them, within
// 1e-5 + 1e-4·|want| on the float32 engine (integer outputs exactly); the
// float64 engine, which ONNX Runtime's float32 kernels differ from by
// rounding, within the same bound.
func TestORTFixtures(t *testing.T) {
	cases := ortdata.Cases(t)
	pass := map[DType]int{}
	for _, c := range cases {
		for _, dt := range []DType{Float32, Float64} {
			msg, err := runORTCase(c, dt)
			switch {
			case err != nil:
				t.Errorf("%s (%s, %s engine): %v", c.Name, c.Checks, dt, err)
			case msg != "":
				t.Errorf("%s (%s, %s engine): %s", c.Name, c.Checks, dt, msg)
			default:
				pass[dt]++
			}
		}
	}
	summary := fmt.Sprintf("ONNX Runtime fixtures: %d of %d pass on the float32 engine, %d on float64", pass[Float32], len(cases), pass[Float64])
	fmt.Println(summary)
	t.Log(summary)
	require.NotEmpty(t, cases)
}
