package main

import (
	"encoding/json"

	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

func jsonString(v any) string {
	b, _ := json.Marshal(v)
	return string(b)
}

// valueTypeName names the type of a graph value: the element type of a
// tensor, or the kind of a non-tensor value.
func valueTypeName(t *onnxlite.Type) string {
	if t == nil {
		return "unknown"
	}
	switch t.Kind {
	case onnxlite.KindTensor:
		return samples.TypeName(t.Elem)
	case onnxlite.KindSparseTensor:
		return "sparse " + samples.TypeName(t.Elem)
	case onnxlite.KindSequence:
		return "sequence of " + valueTypeName(t.Inner)
	case onnxlite.KindMap:
		return "map from " + samples.TypeName(t.Key) + " to " + valueTypeName(t.Inner)
	case onnxlite.KindOptional:
		return "optional " + valueTypeName(t.Inner)
	}
	return "unknown"
}

// initializerNames is the set of graph inputs backed by an initializer.
func initializerNames(g *onnxlite.Graph) map[string]bool {
	set := make(map[string]bool, len(g.Initializers))
	for _, t := range g.Initializers {
		set[t.Name] = true
	}
	return set
}

// feedInputs are the graph inputs a caller must bind, in graph order.
func feedInputs(g *onnxlite.Graph) []*onnxlite.ValueInfo {
	inits := initializerNames(g)
	var out []*onnxlite.ValueInfo
	for _, vi := range g.Inputs {
		if !inits[vi.Name] {
			out = append(out, vi)
		}
	}
	return out
}

// shapeJSON is a declared shape for JSON: numbers for fixed dimensions,
// strings for symbolic ones ("?" when a dimension has neither), nil when the
// rank is unknown.
func shapeJSON(t *onnxlite.Type) []any {
	if t == nil || !t.HasShape {
		return nil
	}
	out := make([]any, len(t.Shape))
	for i, d := range t.Shape {
		switch {
		case d.HasValue:
			out[i] = d.Value
		case d.Param != "":
			out[i] = d.Param
		default:
			out[i] = "?"
		}
	}
	return out
}

func isFloatType(t onnxlite.DataType) bool {
	switch t {
	case onnxlite.Float, onnxlite.Double, onnxlite.Float16, onnxlite.BFloat16:
		return true
	}
	return false
}

// openShapes gives the per-sample shape of b for the compiler when the
// declared shape of spec leaves a non-batch dimension open; nil otherwise.
func openShapes(spec samples.Spec, b *samples.Batch) map[string][]int {
	if _, ok := spec.FixedSample(); ok {
		return nil
	}
	return map[string][]int{spec.Name: append([]int(nil), b.SampleShape()...)}
}
