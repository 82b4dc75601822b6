package nn

import (
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"sort"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/onnxlite"
)

// conformanceClose is the acceptance bound |got − want| ≤ 1e-4 + 1e-3·|want|,
// with NaN and ±Inf required in the same places: the ONNX backend test
// runner's rtol of 1e-3 (onnx/backend/test/runner, from memory) with an
// absolute floor for float32 engines.
func conformanceClose(got, want float64) bool {
	switch {
	case math.IsNaN(want):
		return math.IsNaN(got)
	case math.IsInf(want, 0):
		return got == want
	case math.IsNaN(got) || math.IsInf(got, 0):
		return false
	}
	return math.Abs(got-want) <= 1e-4+1e-3*math.Abs(want)
}

// conformanceCase is one decoded backend case ready to run.
type conformanceCase struct {
	id    string
	model *onnxlite.Model
	sets  [][2][]*onnxlite.Tensor // inputs, outputs
}

// loadConformance decodes every backend case whose operators are supported
// and whose outputs are floating point (float, double, float16, bfloat16):
// its inputs may be of any numeric type (integer shape parameters, token
// ids, half-precision data). The other cases are returned by reason, for
// the log.
func loadConformance(t *testing.T) ([]conformanceCase, map[string][]string) {
	dir := onnxtestdata.Dir(t)
	skipped := map[string][]string{}
	var out []conformanceCase
	for _, c := range onnxtestdata.Cases(t, dir) {
		id := c.Suite + "/" + c.Name
		m, err := onnxlite.DecodeFile(c.Model, onnxlite.DecodeOptions{})
		if err != nil {
			skipped["decode: "+firstLine(err)] = append(skipped["decode: "+firstLine(err)], id)
			continue
		}
		if err := m.Validate(); err != nil {
			reason := "unsupported"
			if !errors.Is(err, onnxlite.ErrUnsupported) {
				reason = "invalid: " + firstLine(err)
			}
			skipped[reason] = append(skipped[reason], id)
			continue
		}
		cc := conformanceCase{id: id, model: m}
		float := len(c.Sets) > 0
		for _, set := range c.Sets {
			ins, outs := onnxtestdata.SetFiles(set)
			var pair [2][]*onnxlite.Tensor
			for k, files := range [][]string{ins, outs} {
				for _, f := range files {
					tt, err := onnxlite.DecodeTensorFile(f, onnxlite.DecodeOptions{})
					if err != nil { // sequences and optionals are not TensorProtos
						float = false
						continue
					}
					if (k == 1 && !isFloat(tt.DType)) || !numeric(tt.DType) {
						float = false
					}
					pair[k] = append(pair[k], tt)
				}
			}
			cc.sets = append(cc.sets, pair)
		}
		if !float {
			skipped["non-float outputs"] = append(skipped["non-float outputs"], id)
			continue
		}
		out = append(out, cc)
	}
	return out, skipped
}

func firstLine(err error) string {
	s := err.Error()
	if i := strings.IndexAny(s, ":\n"); i > 0 && i < 60 {
		return s[:i]
	}
	if len(s) > 60 {
		return s[:60]
	}
	return s
}

// runConformance runs one case on the given engine; it returns "" on
// success and the first mismatch otherwise. A case whose graph needs a
// fold-only operator at run time returns an error wrapping errSkipCase.
func runConformance(c conformanceCase, dt DType) (string, error) {
	nw, err := Compile(c.model, Options{DType: dt, Machines: 1})
	if err != nil {
		return "compile: " + err.Error(), nil
	}
	for si, set := range c.sets {
		ins := make([]*onnxlite.Tensor, len(nw.inputs))
		if len(set[0]) != len(ins) {
			return fmt.Sprintf("set %d: %d input files for %d runtime inputs", si, len(set[0]), len(ins)), nil
		}
		for i, tt := range set[0] {
			ins[i] = asDeclared(tt, nw.inputs[i].DType)
			for j, p := range nw.inputs { // bind by name when the files carry names
				if tt.Name != "" && tt.Name == p.Name {
					ins[j], ins[i] = tt, ins[j]
				}
			}
		}
		got, err := nw.Forward(context.Background(), ins)
		if err != nil {
			// A fold-only operator on run-time values (Shape, Gather, Slice,
			// ConstantOfShape, Range) is outside the supported set.
			if errors.Is(err, onnxlite.ErrFoldOnly) {
				return "", fmt.Errorf("%w: %v", errSkipCase, err)
			}
			return fmt.Sprintf("set %d: forward: %v", si, err), nil
		}
		if len(got) != len(set[1]) {
			return fmt.Sprintf("set %d: %d outputs, want %d", si, len(got), len(set[1])), nil
		}
		for oi, want := range set[1] {
			g := got[oi]
			if !slices.Equal(g.Shape(), want.Shape()) {
				return fmt.Sprintf("set %d output %d: shape %v, want %v", si, oi, g.Shape(), want.Shape()), nil
			}
			gv, _ := g.Float64s()
			wv, _ := want.Float64s()
			for k := range wv {
				if !conformanceClose(gv[k], wv[k]) {
					return fmt.Sprintf("set %d output %d element %d: got %v, want %v", si, oi, k, gv[k], wv[k]), nil
				}
			}
		}
	}
	return "", nil
}

var errSkipCase = errors.New("not supported after folding")

// asDeclared reinterprets a UINT16 data-set tensor as BFLOAT16 when the
// model declares BFLOAT16: ONNX 1.12's generator stores bfloat16 data sets
// as the uint16 bit patterns (numpy has no bfloat16; the reference outputs
// of onnxlite's backend tests note the same).
func asDeclared(t *onnxlite.Tensor, want onnxlite.DataType) *onnxlite.Tensor {
	if want != onnxlite.BFloat16 || t.DType != onnxlite.Uint16 {
		return t
	}
	bits := t.Data.([]uint16)
	b := make([]onnxlite.BFloat16Bits, len(bits))
	for i, v := range bits {
		b[i] = onnxlite.BFloat16Bits(v)
	}
	return &onnxlite.Tensor{Name: t.Name, DType: onnxlite.BFloat16, Dims: t.Dims, Data: b}
}

// TestConformance runs the ONNX backend test data (Debian libonnx-testdata
// 1.12.0) through Forward: the reference outputs are ONNX's own.
func TestConformance(t *testing.T) {
	cases, skipped := loadConformance(t)
	failures := map[string]string{}
	var ran, pass int
	var f32Checked, f32Pass int
	for _, c := range cases {
		msg, err := runConformance(c, Float64)
		if err != nil {
			skipped["unsupported after folding"] = append(skipped["unsupported after folding"], c.id)
			continue
		}
		ran++
		if msg != "" {
			failures[c.id] = msg
			continue
		}
		pass++
		// The float32 engine on the same case, same tolerance.
		f32Checked++
		msg32, err := runConformance(c, Float32)
		if err == nil && msg32 == "" {
			f32Pass++
		} else if _, ok := conformanceExpectedFloat32[c.id]; !ok {
			t.Errorf("%s: float32 engine: %s %v", c.id, msg32, err)
		}
	}
	reasons := make([]string, 0, len(skipped))
	for r := range skipped {
		reasons = append(reasons, r)
	}
	sort.Strings(reasons)
	for _, r := range reasons {
		if len(skipped[r]) <= 30 {
			t.Logf("not run (%s): %d cases: %v", r, len(skipped[r]), skipped[r])
		} else {
			t.Logf("not run (%s): %d cases", r, len(skipped[r]))
		}
	}
	ids := make([]string, 0, len(failures))
	for id := range failures {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	for _, id := range ids {
		if _, ok := conformanceExpected[id]; !ok {
			t.Errorf("%s: unexpected failure: %s", id, failures[id])
		} else {
			t.Logf("%s: expected failure (%s): %s", id, conformanceExpected[id], failures[id])
		}
	}
	for id, why := range conformanceExpected {
		if _, failed := failures[id]; !failed {
			t.Errorf("%s is listed as an expected failure (%s) but did not fail: remove it from conformanceExpected", id, why)
		}
	}
	summary := fmt.Sprintf("%d of %d conformance cases pass", pass, ran)
	fmt.Println(summary)
	t.Log(summary)
	t.Logf("float32 engine: %d of %d passing cases also pass", f32Pass, f32Checked)
	require.Greater(t, pass, 0, "no backend case passed")
}
