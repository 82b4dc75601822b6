package onnxlite

// paramInputs lists, per operator, the inputs that are parameters rather
// than data: target shapes, axes, slice bounds, pads, repeats, split sizes,
// scales and sizes. An engine needs their values when it compiles the node
// (Infer reads them from constants); the other inputs are computed with.
var paramInputs = map[string][]int{
	"Reshape": {1}, "Slice": {1, 2, 3, 4}, "Squeeze": {1}, "Unsqueeze": {1},
	"ReduceSum": {1}, "ReduceMean": {1}, "ReduceMax": {1}, "ReduceMin": {1}, "ReduceL2": {1}, "ReduceLogSumExp": {1},
	"Pad": {1, 2, 3}, "Expand": {1}, "Tile": {1}, "Split": {1}, "Resize": {1, 2, 3}, "Upsample": {1},
	"ConstantOfShape": {0}, "Range": {0, 1, 2}, "Clip": {}, "Dropout": {1, 2},
}

// passesValues lists the operators whose output carries the values of their
// data inputs (moved, combined or converted): an integer value that reaches
// such an operator reaches what its output reaches.
var passesValues = map[string]bool{
	"Identity": true, "Cast": true, "Concat": true, "Reshape": true, "Squeeze": true, "Unsqueeze": true,
	"Flatten": true, "Slice": true, "Gather": true, "Transpose": true, "Expand": true, "Tile": true,
	"Split": true, "Add": true, "Sub": true, "Mul": true, "Div": true, "Neg": true, "Abs": true,
	"Min": true, "Max": true, "Sum": true,
}

// InputUse says what a model computes with one of its runtime inputs.
type InputUse struct {
	// Param: the values reach parameter inputs (a Reshape's shape, a
	// Slice's bounds, axes, pads, repeats, split sizes, Resize's scales or
	// sizes), directly or through integer arithmetic on them, so an engine
	// needs them when it compiles the model.
	Param bool
	// Indices: the values select elements at run time (the indices of a
	// Gather).
	Indices bool
	// Data: the values are computed with at run time.
	Data bool
	// ShapeOnly: the model reads only the input's shape (through Shape).
	ShapeOnly bool
	// Unread: no node reads the input and it is not a graph output, so its
	// values and shape do not matter.
	Unread bool
}

// CompileTime reports whether the input's values are needed only when the
// model is compiled: they reach parameter inputs and nothing is computed
// with them at run time.
func (u InputUse) CompileTime() bool { return u.Param && !u.Indices && !u.Data }

// InputUses returns how m uses each of its runtime graph inputs (those not
// backed by an initializer), by name. An input's values are followed
// through the operators that pass values on (Cast, Concat, Reshape, Slice,
// Gather of its data, integer arithmetic, …) to where they end: a parameter
// input, the indices of a Gather, or any other computation. The shape of a
// value (Shape) is not its values.
func InputUses(m *Model) map[string]InputUse {
	out := map[string]InputUse{}
	if m == nil || m.Graph == nil {
		return out
	}
	g := m.Graph
	readers := map[string][]*Node{}
	for _, n := range g.Nodes {
		if n == nil {
			continue
		}
		for _, in := range n.Inputs {
			if in != "" {
				readers[in] = append(readers[in], n)
			}
		}
	}
	outputs := map[string]bool{}
	for _, o := range g.Outputs {
		if o != nil {
			outputs[o.Name] = true
		}
	}
	for _, name := range runtimeNames(g) {
		u := InputUse{Unread: len(readers[name]) == 0 && !outputs[name]}
		seen := map[string]bool{}
		stack := []string{name}
		for len(stack) > 0 {
			v := stack[len(stack)-1]
			stack = stack[:len(stack)-1]
			if seen[v] {
				continue
			}
			seen[v] = true
			for _, n := range readers[v] {
				for i, in := range n.Inputs {
					if in != v {
						continue
					}
					switch {
					case n.OpType == "Shape":
						u.ShapeOnly = true
					case isParamInput(n.OpType, i):
						u.Param = true
					case n.OpType == "Gather" && i == 1:
						u.Indices = true
					case passesValues[n.OpType] && isDefaultDomain(n.Domain):
						stack = append(stack, n.Outputs...)
					default:
						u.Data = true
					}
				}
			}
		}
		u.ShapeOnly = u.ShapeOnly && !u.Param && !u.Indices && !u.Data
		out[name] = u
	}
	return out
}

func isParamInput(op string, i int) bool {
	for _, j := range paramInputs[op] {
		if j == i {
			return true
		}
	}
	return false
}

// FoldOnlyOnRuntime lists the nodes of fold-only operators (see FoldOnly)
// that read a value computed at run time, which no constant folding can
// remove: a model with such nodes does not compile. A value is computed at
// run time when it depends on a runtime input whose values the model
// computes with (not a compile-time input, InputUse.CompileTime), other
// than through its shape (Shape).
func FoldOnlyOnRuntime(m *Model) []UnsupportedOp {
	if m == nil || m.Graph == nil {
		return nil
	}
	uses := InputUses(m)
	runtime := map[string]bool{}
	for name, u := range uses {
		runtime[name] = !u.CompileTime() && !u.Unread
	}
	order, err := topoOrder(m.Graph)
	if err != nil {
		return nil
	}
	var out []UnsupportedOp
	for _, i := range order {
		n := m.Graph.Nodes[i]
		if n == nil || n.OpType == "Shape" {
			continue
		}
		reads := false
		for _, in := range n.Inputs {
			reads = reads || runtime[in]
		}
		if !reads {
			continue
		}
		for _, o := range n.Outputs {
			runtime[o] = true
		}
		if isDefaultDomain(n.Domain) && FoldOnly(n.OpType) {
			out = append(out, UnsupportedOp{Op: n.OpType, Node: nodeName(n, i)})
		}
	}
	return out
}
