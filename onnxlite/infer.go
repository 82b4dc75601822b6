package onnxlite

import (
	"fmt"
	"slices"
	"strings"
)

// Static is a model specialised to concrete input shapes.
type Static struct {
	Model   *Model
	Nodes   []*Node               // nodes left after folding, topologically sorted
	Values  map[string]ValueShape // every value: graph inputs, initializers, node outputs
	Consts  map[string]*Tensor    // initializers and folded values, by name
	Inputs  []string              // runtime graph inputs (not backed by an initializer), in graph order
	Outputs []string              // graph outputs in order
}

// ValueShape is the element type and concrete shape of one value.
type ValueShape struct {
	DType DataType
	Shape []int
}

// String formats v as e.g. "FLOAT[1 3 224 224]".
func (v ValueShape) String() string { return fmt.Sprintf("%v%v", v.DType, v.Shape) }

// NumElements is the product of the dims (1 for a scalar).
func (v ValueShape) NumElements() int64 { return prodInt64(v.Shape) }

// Infer is InferWith with the given input shapes and no other options.
func Infer(m *Model, inputs map[string][]int) (*Static, error) {
	return InferWith(m, InferOptions{Shapes: inputs})
}

// InferOptions tune InferWith. The zero value uses the declared input shapes
// and folds only what onnxlite evaluates itself.
type InferOptions struct {
	// Shapes maps runtime graph inputs (those not backed by an initializer)
	// to concrete shapes. An input absent from the map uses its declared
	// shape, which must then be fully fixed; a given shape must have the
	// declared rank and agree with every declared fixed dim.
	Shapes map[string][]int
	// Values holds runtime graph inputs whose values are known when the
	// model is specialised (see InputUses): each is a constant of the
	// result, with the tensor's shape, and is not listed in Static.Inputs.
	// An input that nothing reads (InputUse.Unread) is left out of the
	// result whatever Shapes and Values give for it.
	Values map[string]*Tensor
	// Eval, when set, evaluates every node whose inputs are all constant
	// and that onnxlite does not fold itself (see Evaluator).
	Eval Evaluator
}

// Evaluator computes the outputs of node n of a model of default-domain
// opset opset, all of whose inputs are the constants in inputs (nil for an
// omitted optional input). outputs gives the element type and shape Infer
// inferred for each output (the zero ValueShape for an omitted one); the
// result has one tensor per output, nil for omitted ones, of that type and
// shape, except that a floating-point value may be held in another
// floating-point type: the precision the evaluator computed it in, which
// Static.Consts keeps (Static.Values keeps the ONNX type). nn's engine is
// one: it runs the node with the operators it runs at run time.
type Evaluator func(n *Node, opset int64, inputs []*Tensor, outputs []ValueShape) ([]*Tensor, error)

// InferWith validates m (see Validate), gives every value a concrete shape
// and element type, and folds the constant subgraphs of the model: the shape
// arithmetic that exporters emit, and with opts.Eval every node whose inputs
// are all constant.
//
// The shape rules follow the ONNX operator specifications (Operators.md and
// Changelog.md of ONNX 1.23, opsets 1 to MaxOpset) for every supported
// operator, with each revision's semantics where they changed, and numpy
// broadcasting for the elementwise operators. A node whose inputs are all
// constant and whose operator is Shape, Gather, Slice, Squeeze, Unsqueeze,
// Concat, Cast, Constant, ConstantOfShape, Range, Reshape, Identity,
// Flatten, integer Add/Sub/Mul/Div, or float Add/Sub/Mul/Div/Neg of at most
// 4096 elements, is evaluated exactly by onnxlite; any other node whose
// inputs are all constant is evaluated by opts.Eval when it is set. The
// outputs of an evaluated node go to Consts and the node leaves Nodes. Shape
// always folds, to the inferred shape of its input. A fold-only operator
// (see FoldOnly) that cannot be folded is an error naming the node that
// wraps ErrFoldOnly and ErrUnsupported.
//
// A value with more than DefaultLimits.MaxTensorElements elements or a rank
// above DefaultLimits.MaxRank is a *LimitError.
func InferWith(m *Model, opts InferOptions) (st *Static, err error) {
	defer recoverTo(&err, "infer", ErrInvalid)
	order, err := m.validate()
	if err != nil {
		return nil, err
	}
	g := m.Graph
	s := &Static{
		Model:  m,
		Values: map[string]ValueShape{},
		Consts: map[string]*Tensor{},
	}
	for _, t := range g.Initializers {
		if err := checkTensor(t); err != nil {
			return nil, invalidf("initializer %q: %v", t.Name, err)
		}
		vs := ValueShape{DType: t.DType, Shape: t.Shape()}
		if err := checkValueLimits(t.Name, vs); err != nil {
			return nil, err
		}
		s.Values[t.Name] = vs
		s.Consts[t.Name] = t
	}
	runtime := map[string]bool{}
	params := map[string]symbolicDim{}
	shapes := opts.Shapes
	uses := InputUses(m)
	for _, in := range g.Inputs {
		if _, ok := s.Consts[in.Name]; ok {
			continue
		}
		runtime[in.Name] = true
		if uses[in.Name].Unread {
			continue // nothing reads it: no shape or value to check
		}
		if t, ok := opts.Values[in.Name]; ok {
			vs, err := heldInput(in, t)
			if err != nil {
				return nil, err
			}
			if err := bindParams(in, vs.Shape, params); err != nil {
				return nil, err
			}
			s.Values[in.Name] = vs
			s.Consts[in.Name] = t
			continue
		}
		vs, err := inputShape(in, shapes)
		if err != nil {
			return nil, err
		}
		if err := checkValueLimits(in.Name, vs); err != nil {
			return nil, err
		}
		if err := bindParams(in, vs.Shape, params); err != nil {
			return nil, err
		}
		s.Values[in.Name] = vs
		s.Inputs = append(s.Inputs, in.Name)
	}
	for name := range shapes {
		if !runtime[name] {
			return nil, fmt.Errorf("input shape given for %q: expected one of the runtime graph inputs %v", name, runtimeNames(g))
		}
		if _, held := opts.Values[name]; held {
			return nil, fmt.Errorf("input %q: given both a shape and a value", name)
		}
	}
	for name := range opts.Values {
		if !runtime[name] {
			return nil, fmt.Errorf("input value given for %q: expected one of the runtime graph inputs %v", name, runtimeNames(g))
		}
	}
	opset := m.OpsetVersion("")
	for _, i := range order {
		if err := s.inferNode(g.Nodes[i], i, opset, opts.Eval); err != nil {
			return nil, err
		}
	}
	for _, o := range g.Outputs {
		if _, ok := s.Values[o.Name]; !ok {
			return nil, invalidf("graph output %q has no inferred value", o.Name)
		}
		s.Outputs = append(s.Outputs, o.Name)
	}
	return s, nil
}

// runtimeNames lists the runtime graph inputs of g (those not backed by an
// initializer) in graph order.
func runtimeNames(g *Graph) []string {
	inits := map[string]bool{}
	for _, t := range g.Initializers {
		inits[t.Name] = true
	}
	var out []string
	for _, in := range g.Inputs {
		if !inits[in.Name] {
			out = append(out, in.Name)
		}
	}
	return out
}

// heldInput checks a value given for a runtime input against the input's
// declared type and shape.
func heldInput(in *ValueInfo, t *Tensor) (ValueShape, error) {
	if in.Type == nil || in.Type.Kind != KindTensor {
		return ValueShape{}, invalidf("graph input %q: expected a tensor type, got %s", in.Name, describeType(in.Type))
	}
	if err := checkTensor(t); err != nil {
		return ValueShape{}, fmt.Errorf("input %q: %v", in.Name, err)
	}
	if t.DType != in.Type.Elem {
		return ValueShape{}, fmt.Errorf("input %q: expected a %v tensor, got %v", in.Name, in.Type.Elem, t.DType)
	}
	vs, err := inputShape(in, map[string][]int{in.Name: t.Shape()})
	if err != nil {
		return ValueShape{}, err
	}
	return vs, checkValueLimits(in.Name, vs)
}

// inputShape resolves the concrete shape of a runtime graph input.
func inputShape(in *ValueInfo, given map[string][]int) (ValueShape, error) {
	if in.Type == nil || in.Type.Kind != KindTensor {
		return ValueShape{}, invalidf("graph input %q: expected a tensor type, got %s", in.Name, describeType(in.Type))
	}
	vs := ValueShape{DType: in.Type.Elem}
	shape, ok := given[in.Name]
	if ok {
		for i, d := range shape {
			if d < 0 {
				return vs, invalidf("graph input %q: given shape %v: expected non-negative dims, got %d at axis %d", in.Name, shape, d, i)
			}
		}
		if in.Type.HasShape {
			if len(shape) != len(in.Type.Shape) {
				return vs, invalidf("graph input %q: expected rank %d (declared %s), got shape %v of rank %d",
					in.Name, len(in.Type.Shape), describeDims(in.Type.Shape), shape, len(shape))
			}
			for i, d := range in.Type.Shape {
				if d.HasValue && d.Value != int64(shape[i]) {
					return vs, invalidf("graph input %q: axis %d: expected %d (declared %s), got %d",
						in.Name, i, d.Value, describeDims(in.Type.Shape), shape[i])
				}
			}
		}
		vs.Shape = slices.Clone(shape)
		return vs, nil
	}
	if !in.Type.HasShape {
		return vs, invalidf("graph input %q: declared with unknown rank: expected a concrete shape for it", in.Name)
	}
	vs.Shape = make([]int, len(in.Type.Shape))
	for i, d := range in.Type.Shape {
		switch {
		case d.HasValue && d.Value >= 0:
			vs.Shape[i] = int(d.Value)
		case d.Param != "":
			return vs, invalidf("graph input %q: axis %d is the symbolic dim %q: expected a concrete shape for the input", in.Name, i, d.Param)
		default:
			return vs, invalidf("graph input %q: axis %d has no fixed size (declared %s): expected a concrete shape for the input", in.Name, i, describeDims(in.Type.Shape))
		}
	}
	return vs, nil
}

// symbolicDim records where a dim_param was first bound to a size.
type symbolicDim struct {
	size  int
	input string
	axis  int
}

// bindParams checks that a symbolic dim shared by several inputs gets one size.
func bindParams(in *ValueInfo, shape []int, params map[string]symbolicDim) error {
	for i, d := range in.Type.Shape {
		if d.HasValue || d.Param == "" || i >= len(shape) {
			continue
		}
		if p, ok := params[d.Param]; ok && p.size != shape[i] {
			return invalidf("graph input %q: axis %d is the symbolic dim %q, bound to %d by input %q axis %d: expected %d, got %d",
				in.Name, i, d.Param, p.size, p.input, p.axis, p.size, shape[i])
		} else if !ok {
			params[d.Param] = symbolicDim{shape[i], in.Name, i}
		}
	}
	return nil
}

func describeType(t *Type) string {
	if t == nil {
		return "no type"
	}
	switch t.Kind {
	case KindTensor:
		return "tensor"
	case KindSequence:
		return "sequence"
	case KindMap:
		return "map"
	case KindOptional:
		return "optional"
	case KindSparseTensor:
		return "sparse tensor"
	}
	return "unknown type"
}

func describeDims(ds []Dim) string {
	parts := make([]string, len(ds))
	for i, d := range ds {
		switch {
		case d.HasValue:
			parts[i] = fmt.Sprint(d.Value)
		case d.Param != "":
			parts[i] = d.Param
		default:
			parts[i] = "?"
		}
	}
	return "[" + strings.Join(parts, " ") + "]"
}

// checkValueLimits refuses values beyond DefaultLimits.MaxTensorElements or DefaultLimits.MaxRank.
func checkValueLimits(name string, vs ValueShape) error {
	if len(vs.Shape) > DefaultLimits.MaxRank {
		return fmt.Errorf("value %q: shape %v: %w", name, vs.Shape,
			&LimitError{Limit: "MaxRank", Value: int64(len(vs.Shape)), Max: int64(DefaultLimits.MaxRank)})
	}
	dims := make([]int64, len(vs.Shape))
	for i, d := range vs.Shape {
		dims[i] = int64(d)
	}
	if _, err := elementCount(dims, DefaultLimits.MaxTensorElements); err != nil {
		return fmt.Errorf("value %q: shape %v: %w", name, vs.Shape, err)
	}
	return nil
}

// nodeCtx is one node during inference: its inputs' shapes and constants.
type nodeCtx struct {
	n      *Node
	idx    int
	opset  int64
	in     []*ValueShape // nil for an omitted optional input
	consts []*Tensor     // nil unless the input is constant
}

// errorf returns an error wrapping ErrInvalid that names the node and its
// operator: the model breaks the operator's specification.
func (c *nodeCtx) errorf(format string, args ...any) error {
	return invalidf("node %q (%s): "+format, append([]any{nodeName(c.n, c.idx), c.n.OpType}, args...)...)
}

// unsupportedf returns an error wrapping ErrUnsupported that names the node
// and its operator: the node is valid, but asks for something apportion
// does not compute.
func (c *nodeCtx) unsupportedf(format string, args ...any) error {
	return unsupportedf("node %q (%s): "+format, append([]any{nodeName(c.n, c.idx), c.n.OpType}, args...)...)
}

// wrap prefixes err with the node's name and operator.
func (c *nodeCtx) wrap(err error) error {
	return fmt.Errorf("node %q (%s): %w", nodeName(c.n, c.idx), c.n.OpType, err)
}

// input returns input i, or nil when it is omitted.
func (c *nodeCtx) input(i int) *ValueShape {
	if i < len(c.in) {
		return c.in[i]
	}
	return nil
}

// need returns input i or an error when it is omitted.
func (c *nodeCtx) need(i int) (*ValueShape, error) {
	if v := c.input(i); v != nil {
		return v, nil
	}
	return nil, c.errorf("expected input %d, got none (the node has %d inputs)", i, len(c.n.Inputs))
}

// constInput returns constant input i; ok is false when the input is
// omitted. A run-time value there is an error wrapping ErrUnsupported.
func (c *nodeCtx) constInput(i int, what string) (t *Tensor, ok bool, err error) {
	if c.input(i) == nil {
		return nil, false, nil
	}
	if t = c.consts[i]; t == nil {
		return nil, true, c.unsupportedf("its %s (input %d, %q) are computed at run time: apportion needs them constant (an initializer, a folded value or an input given with the model)",
			what, i, c.n.Inputs[i])
	}
	return t, true, nil
}

// constInts returns the integer elements of constant input i; ok is false
// when the input is omitted.
func (c *nodeCtx) constInts(i int, what string) (vals []int64, ok bool, err error) {
	t, ok, err := c.constInput(i, what)
	if t == nil {
		return nil, ok, err
	}
	v, err := t.Int64s()
	if err != nil {
		return nil, true, c.errorf("%s (input %d): expected an integer tensor, got %v", what, i, t.DType)
	}
	return v, true, nil
}

// requiredInts is constInts for an input the node cannot do without.
func (c *nodeCtx) requiredInts(i int, what string) ([]int64, error) {
	vals, ok, err := c.constInts(i, what)
	if err == nil && !ok {
		err = c.errorf("expected the %s input, got none", what)
	}
	return vals, err
}

func (c *nodeCtx) allConst() bool {
	for i, v := range c.in {
		if v != nil && c.consts[i] == nil {
			return false
		}
	}
	return true
}

func (s *Static) inferNode(n *Node, idx int, opset int64, eval Evaluator) error {
	c := &nodeCtx{n: n, idx: idx, opset: opset,
		in: make([]*ValueShape, len(n.Inputs)), consts: make([]*Tensor, len(n.Inputs))}
	for i, name := range n.Inputs {
		if name == "" {
			continue
		}
		v := s.Values[name]
		c.in[i] = &v
		c.consts[i] = s.Consts[name]
	}
	var outs []*Tensor
	var err error
	switch {
	case n.OpType == "Shape":
		outs, err = foldShape(c)
	case c.allConst() && canFold(c):
		outs, err = fold(c)
	case FoldOnly(n.OpType) && !c.allConst():
		return fmt.Errorf("%w: node %q (%s): %s needs constant inputs, got the run-time value(s) %s (%w)",
			ErrUnsupported, nodeName(n, idx), n.OpType, n.OpType, runtimeInputs(c), ErrFoldOnly)
	}
	if err != nil {
		return err
	}
	if outs != nil {
		return s.setConsts(c, outs)
	}
	shapes, err := c.outShapes()
	if err != nil {
		return err
	}
	for i, o := range n.Outputs {
		if o == "" {
			continue
		}
		if i >= len(shapes) {
			return c.errorf("output %d (%q): expected at most %d outputs, got %d", i, o, len(shapes), len(n.Outputs))
		}
		if err := checkValueLimits(o, shapes[i]); err != nil {
			return c.wrap(err)
		}
	}
	if eval != nil && c.allConst() && len(n.Inputs) > 0 {
		return s.evaluate(c, eval, shapes)
	}
	for i, o := range n.Outputs {
		if o != "" {
			s.Values[o] = shapes[i]
		}
	}
	s.Nodes = append(s.Nodes, n)
	return nil
}

// evaluate folds a node whose inputs are all constant with eval, checking
// that each result has the element type and shape the rules inferred.
func (s *Static) evaluate(c *nodeCtx, eval Evaluator, shapes []ValueShape) error {
	want := make([]ValueShape, len(c.n.Outputs))
	for i, o := range c.n.Outputs {
		if o != "" {
			want[i] = shapes[i]
		}
	}
	outs, err := eval(c.n, c.opset, c.consts, want)
	if err != nil {
		return c.wrap(err)
	}
	for i, o := range c.n.Outputs {
		if o == "" {
			continue
		}
		if i >= len(outs) || outs[i] == nil {
			return c.wrap(fmt.Errorf("constant folding computed no value for output %q", o))
		}
		t := outs[i]
		sameKind := t.DType == want[i].DType || isFloatType(t.DType) && isFloatType(want[i].DType)
		if !sameKind || !slices.Equal(t.Shape(), want[i].Shape) {
			return c.wrap(fmt.Errorf("constant folding computed %v%v for output %q, inference gives %v", t.DType, t.Shape(), o, want[i]))
		}
	}
	if err := s.setConsts(c, outs); err != nil {
		return err
	}
	for i, o := range c.n.Outputs {
		if o != "" {
			s.Values[o] = want[i] // the ONNX type, whatever precision Eval kept
		}
	}
	return nil
}

func isFloatType(dt DataType) bool {
	return dt == Float || dt == Double || dt == Float16 || dt == BFloat16
}

// setConsts records the folded outputs of c's node as constants.
func (s *Static) setConsts(c *nodeCtx, outs []*Tensor) error {
	for i, t := range outs {
		if i >= len(c.n.Outputs) || c.n.Outputs[i] == "" || t == nil {
			continue
		}
		t.Name = c.n.Outputs[i]
		vs := ValueShape{DType: t.DType, Shape: t.Shape()}
		if err := checkValueLimits(t.Name, vs); err != nil {
			return c.wrap(err)
		}
		s.Values[t.Name] = vs
		s.Consts[t.Name] = t
	}
	return nil
}

func runtimeInputs(c *nodeCtx) string {
	var names []string
	for i, v := range c.in {
		if v != nil && c.consts[i] == nil {
			names = append(names, fmt.Sprintf("%q", c.n.Inputs[i]))
		}
	}
	return strings.Join(names, ", ")
}

func prodInt64(s []int) int64 {
	p := int64(1)
	for _, d := range s {
		p *= int64(d)
	}
	return p
}

func prod(s []int) int {
	p := 1
	for _, d := range s {
		p *= d
	}
	return p
}
