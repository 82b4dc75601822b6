package explain

import (
	"errors"
	"strings"

	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// Description is what a model is: the inspect document (and GET /v1/model).
// Shapes hold numbers for fixed dimensions, strings for symbolic ones ("?"
// when a dimension has neither), and are null when the rank is unknown.
type Description struct {
	Inputs      []Value           `json:"inputs"`
	Outputs     []Value           `json:"outputs"`
	Opset       int64             `json:"opset"`
	Producer    string            `json:"producer"`
	Ops         map[string]int    `json:"ops"`
	Parameters  int64             `json:"parameters"`
	Metadata    map[string]string `json:"metadata"`
	Unsupported []Unsupported     `json:"unsupported"`
	// MaxOpset is the newest default-domain opset apportion reads.
	MaxOpset int64 `json:"max_opset"`
	// FoldOnly lists the nodes of operators apportion computes only as
	// constants (Shape, ConstantOfShape, Range) that read values computed
	// at run time: the model does not compile.
	FoldOnly []Unsupported `json:"fold_only"`
	// Explainable is compile's verdict: "yes", or "no: " and the reason,
	// or "not checked: " and why it needs samples to tell.
	Explainable string `json:"explainable"`
}

// Value is one graph input or output of a Description. Use, for inputs,
// says what the model computes with it: "data" (its values, at run time),
// "indices" (integers that select elements at run time, such as token
// ids), "compile-time" (parameters such as a target shape: each value
// compiles a program of its own), or "unread" (nothing reads it).
type Value struct {
	Name  string `json:"name"`
	Type  string `json:"type"`
	Shape []any  `json:"shape"`
	Use   string `json:"use,omitempty"`
}

// Unsupported is an operator node the engine cannot run.
type Unsupported struct {
	Op     string `json:"op"`
	Node   string `json:"node"`
	Domain string `json:"-"`
}

// Describe describes m: the inputs a caller binds (initializer-backed
// inputs are parameters), the outputs, the default-domain opset, the
// producer, the node count per operator (domain-qualified outside the
// default domain), the number of float parameters, the metadata and the
// operators the engine cannot run.
func (m *Model) Describe() *Description {
	g := m.Graph.Graph
	d := &Description{
		Inputs:      []Value{},
		Outputs:     []Value{},
		Opset:       m.Graph.OpsetVersion(""),
		Producer:    m.Graph.ProducerName,
		Ops:         map[string]int{},
		Metadata:    map[string]string{},
		Unsupported: []Unsupported{},
	}
	uses := onnxlite.InputUses(m.Graph)
	for _, vi := range m.Inputs() {
		d.Inputs = append(d.Inputs, Value{vi.Name, typeName(vi.Type), shapeJSON(vi.Type), useName(uses[vi.Name])})
	}
	for _, vi := range g.Outputs {
		d.Outputs = append(d.Outputs, Value{Name: vi.Name, Type: typeName(vi.Type), Shape: shapeJSON(vi.Type)})
	}
	for _, n := range g.Nodes {
		op := n.OpType
		if n.Domain != "" && n.Domain != "ai.onnx" {
			op = n.Domain + "." + op
		}
		d.Ops[op]++
	}
	for _, t := range g.Initializers {
		switch t.DType {
		case onnxlite.Float, onnxlite.Double, onnxlite.Float16, onnxlite.BFloat16:
			n := int64(1)
			for _, dim := range t.Dims {
				n *= dim
			}
			d.Parameters += n
		}
	}
	for k, v := range m.Graph.Metadata {
		d.Metadata[k] = v
	}
	for _, u := range nn.Unsupported(m.Graph) {
		d.Unsupported = append(d.Unsupported, Unsupported{Op: u.Op, Node: u.Node, Domain: u.Domain})
	}
	d.MaxOpset = onnxlite.MaxOpset
	d.FoldOnly = []Unsupported{}
	for _, u := range onnxlite.FoldOnlyOnRuntime(m.Graph) {
		d.FoldOnly = append(d.FoldOnly, Unsupported{Op: u.Op, Node: u.Node})
	}
	d.Explainable = m.verdict()
	return d
}

// useName names what the model computes with an input (see Value.Use).
func useName(u onnxlite.InputUse) string {
	switch {
	case u.Unread:
		return "unread"
	case u.CompileTime():
		return "compile-time"
	case u.Indices && !u.Data:
		return "indices"
	}
	return "data"
}

// verdict compiles the model (a float32 network of its own when m is not
// compiled) as for a first explanation of its first output with respect to
// the input explanations attribute to, and says whether that works.
func (m *Model) verdict() string {
	nw := m.net
	var fwd, grad error
	err := guard(func() error {
		if nw == nil {
			var err error
			if nw, err = nn.Compile(m.Graph, nn.Options{Machines: 1}); err != nil {
				return err
			}
		}
		fwd, grad = nw.Check()
		return nil
	})
	switch {
	case err != nil:
		return "no: " + err.Error()
	case errors.Is(fwd, nn.ErrUnchecked):
		return "not checked: " + strings.TrimPrefix(fwd.Error(), nn.ErrUnchecked.Error()+": ")
	case fwd != nil:
		return "no: " + fwd.Error()
	}
	if _, err := m.Input(); err != nil {
		return "no: " + err.Error()
	}
	if grad != nil {
		return "no: " + grad.Error()
	}
	return "yes"
}

// typeName names the type of a graph value: the element type of a tensor,
// or the kind of a non-tensor value.
func typeName(t *onnxlite.Type) string {
	if t == nil {
		return "unknown"
	}
	switch t.Kind {
	case onnxlite.KindTensor:
		return samples.TypeName(t.Elem)
	case onnxlite.KindSparseTensor:
		return "sparse " + samples.TypeName(t.Elem)
	case onnxlite.KindSequence:
		return "sequence of " + typeName(t.Inner)
	case onnxlite.KindMap:
		return "map from " + samples.TypeName(t.Key) + " to " + typeName(t.Inner)
	case onnxlite.KindOptional:
		return "optional " + typeName(t.Inner)
	}
	return "unknown"
}

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
