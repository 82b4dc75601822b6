package nn

import (
	"context"
	"errors"
	"fmt"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/nn/internal/ops"
	"github.com/apportion/apportion/onnxlite"
)

// machinePool holds at most max machines of one program. gorgonia machines
// are not safe for concurrent use, so each run takes a machine for itself;
// machines are built on demand and a caller blocks while all are busy.
type machinePool struct {
	build func() (*machine, error)
	idle  chan *machine
	slots chan struct{} // one token per machine in existence
}

func newMachinePool(size int, build func() (*machine, error)) *machinePool {
	if size < 1 {
		size = 1
	}
	return &machinePool{build: build, idle: make(chan *machine, size), slots: make(chan struct{}, size)}
}

// acquire returns an idle machine, builds one while fewer than max exist, or
// waits for one to be released, whichever comes first; ctx cancels the wait.
func (mp *machinePool) acquire(ctx context.Context) (*machine, error) {
	select {
	case m := <-mp.idle:
		return m, nil
	default:
	}
	select {
	case m := <-mp.idle:
		return m, nil
	case mp.slots <- struct{}{}:
		built := false
		defer func() {
			if !built { // an error, or a panic on its way to the caller
				<-mp.slots
			}
		}()
		m, err := mp.build()
		if err != nil {
			return nil, err
		}
		built = true
		return m, nil
	case <-ctx.Done():
		return nil, ctx.Err()
	}
}

// release returns m to the pool, or discards it (freeing its slot) when the
// run that used it failed.
func (mp *machinePool) release(m *machine, ok bool) {
	if !ok {
		<-mp.slots
		return
	}
	mp.idle <- m
}

// inputPrefix starts the name of every runtime input node; that of every
// model constant starts with ops.ConstPrefix.
const inputPrefix = "input:"

// machine is one gorgonia graph of a program with its execution plan and
// the buffers it keeps from one pass to the next (see buffers.go).
type machine struct {
	g       *G.ExprGraph
	plan    []step
	slot    map[*G.Node]int // node → index in plan and vals
	vals    []G.Value
	args    []G.Value
	dt      tensor.Dtype
	inputs  []*G.Node
	outputs []*G.Node
	mask    *G.Node
	grad    *G.Node

	pre   []G.Value           // per step: the kept output buffer, or nil
	pd    []G.UsePreallocDoer // per step: the op that writes into pre
	bound []*tensor.Dense     // the tensors bound to inputs, then the mask
	kept  int                 // bytes of the output buffers
}

// build translates the program's graph into a fresh gorgonia graph.
func (p *program) build() (m *machine, err error) {
	dt := tensor.Float32
	if p.nw.opts.DType == Float64 {
		dt = tensor.Float64
	}
	b := newBuilder(p.static, dt, p.nw.model)
	m = &machine{g: b.g, dt: dt}
	for i, name := range p.static.Inputs {
		shape := p.inShapes[i]
		if v, ok := p.static.Values[name]; ok {
			shape = v.Shape
		}
		gs := gShape(shape)
		n := G.NewTensor(b.g, dt, len(gs), G.WithShape(gs...), G.WithName(inputPrefix+name))
		b.vals[name] = n
		m.inputs = append(m.inputs, n)
	}
	for _, n := range needed(p.static.Nodes, p.outNames) {
		if err := b.node(n); err != nil {
			return nil, fmt.Errorf("node %q (%s): %w", nodeLabel(p.static.Model, n), n.OpType, err)
		}
	}
	for _, o := range p.outNames {
		n, err := b.value(o)
		if err != nil {
			return nil, fmt.Errorf("output %q: %w", o, err)
		}
		m.outputs = append(m.outputs, n)
	}
	if p.req.grad {
		out := m.outputs[0]
		m.mask = G.NewTensor(b.g, dt, out.Shape().Dims(), G.WithShape(out.Shape().Clone()...), G.WithName("selection-mask"))
		loss, err := ops.SelectionLoss(out, m.mask)
		if err != nil {
			return nil, fmt.Errorf("selecting from output %q: %w", p.outNames[0], err)
		}
		// The seed ∂loss/∂loss = 1 is a constant of this graph. G.Grad
		// would seed with a constant node gorgonia keeps at package level,
		// and adding that node to the graph caches its hash in it without
		// synchronisation: a data race between machines built on several
		// goroutines at once. With a seed of its own, building a machine
		// touches no state outside its graph.
		var one any = float32(1)
		if dt == tensor.Float64 {
			one = float64(1)
		}
		seed := b.g.AddNode(G.NewConstant(one))
		grads, err := G.Backpropagate(G.Nodes{loss}, G.Nodes{seed}, G.Nodes{m.inputs[p.req.wrt]})
		if err != nil {
			return nil, fmt.Errorf("differentiating output %q w.r.t. input %q: %w", p.outNames[0], p.static.Inputs[p.req.wrt], err)
		}
		m.grad = grads[0]
	}
	keep := append(G.Nodes(nil), m.outputs...)
	if m.grad != nil {
		keep = append(keep, m.grad)
	}
	if err := m.compile(keep); err != nil {
		return nil, err
	}
	return m, nil
}

// run writes data into the machine's input tensors, runs the plan once and
// copies the results out. The buffers the machine keeps are overwritten
// whole by the step that owns them in each run, so nothing leaks from one
// run into the next, and the results returned share no memory with them.
func (m *machine) run(p *program, data [][]float64, mask []float64) (outs [][]float64, grad []float64, err error) {
	defer clear(m.vals) // keep no pass's values alive between runs
	for i := range m.inputs {
		if err := ops.Fill(m.bound[i], data[i]); err != nil {
			return nil, nil, fmt.Errorf("%w: binding input %q: %v", ErrEngine, p.static.Inputs[i], err)
		}
	}
	if m.mask != nil {
		if err := ops.Fill(m.bound[len(m.inputs)], mask); err != nil {
			return nil, nil, fmt.Errorf("%w: binding the selection mask: %v", ErrEngine, err)
		}
	}
	if err := m.exec(); err != nil {
		if ie := (*ops.IndexError)(nil); errors.As(err, &ie) {
			return nil, nil, fmt.Errorf("%w: %v", ErrBadRequest, ie)
		}
		return nil, nil, fmt.Errorf("%w: %v", ErrEngine, err)
	}
	outs = make([][]float64, len(m.outputs))
	for i, n := range m.outputs {
		if outs[i], err = ops.Floats(m.vals[m.slot[n]]); err != nil {
			return nil, nil, fmt.Errorf("%w: output %q: %v", ErrEngine, p.outNames[i], err)
		}
		if want := prod(p.outShapes[i]); len(outs[i]) != want {
			return nil, nil, fmt.Errorf("%w: output %q has %d values, shape inference expects %v", ErrEngine, p.outNames[i], len(outs[i]), p.outShapes[i])
		}
	}
	if m.grad != nil {
		if grad, err = ops.Floats(m.vals[m.slot[m.grad]]); err != nil {
			return nil, nil, fmt.Errorf("%w: gradient: %v", ErrEngine, err)
		}
		if len(grad) != len(data[p.req.wrt]) {
			return nil, nil, fmt.Errorf("%w: gradient has %d values, the input %d", ErrEngine, len(grad), len(data[p.req.wrt]))
		}
	}
	return outs, grad, nil
}

// step is one node of a machine's plan: an input or weight node (op
// nil), whose value is the one bound to it, or an op applied to the values
// of earlier steps.
type step struct {
	node *G.Node
	op   G.Op
	args []int
}

// compile orders the nodes that the values keep depend on, children first,
// into m.plan. Nodes nothing requested depends on (the gradients of weights
// and biases that differentiation builds alongside the input gradient) are
// left out, so they never run.
//
// The plan runs each op's Do on the values of its children, on the calling
// goroutine. gorgonia's tape machine would run the same ops, but every
// RunAll locks an OS thread and hands the work to a new goroutine, a
// cross-thread handoff that costs tens of microseconds per pass, most of the
// time of a small model's pass at GOMAXPROCS=1.
func (m *machine) compile(keep G.Nodes) error {
	live := map[*G.Node]bool{}
	stack := append(G.Nodes(nil), keep...)
	for len(stack) > 0 {
		n := stack[len(stack)-1]
		stack = stack[:len(stack)-1]
		if live[n] {
			continue
		}
		live[n] = true
		for it := m.g.From(n.ID()); it.Next(); {
			c, ok := it.Node().(*G.Node)
			if !ok {
				return fmt.Errorf("%w: node %v has a child of type %T", ErrEngine, n, it.Node())
			}
			stack = append(stack, c)
		}
	}
	sorted, err := G.Sort(m.g)
	if err != nil {
		return fmt.Errorf("%w: ordering the graph: %v", ErrEngine, err)
	}
	m.slot = map[*G.Node]int{}
	for i := len(sorted) - 1; i >= 0; i-- { // G.Sort puts parents first
		n := sorted[i]
		if !live[n] {
			continue
		}
		st := step{node: n, op: n.Op()}
		if st.op != nil {
			for it := m.g.From(n.ID()); it.Next(); {
				j, ok := m.slot[it.Node().(*G.Node)]
				if !ok {
					return fmt.Errorf("%w: node %v runs before its child %v", ErrEngine, n, it.Node())
				}
				st.args = append(st.args, j)
			}
			if len(st.args) > cap(m.args) {
				m.args = make([]G.Value, 0, len(st.args))
			}
		}
		m.slot[n] = len(m.plan)
		m.plan = append(m.plan, st)
	}
	m.vals = make([]G.Value, len(m.plan))
	if err := m.assignBuffers(keep); err != nil {
		return err
	}
	bind := append(G.Nodes(nil), m.inputs...)
	if m.mask != nil {
		bind = append(bind, m.mask)
	}
	for _, n := range bind {
		t := ops.Dense(m.dt, n.Shape(), make([]float64, n.Shape().TotalSize()))
		if err := G.Let(n, t); err != nil {
			return fmt.Errorf("%w: binding %v: %v", ErrEngine, n, err)
		}
		m.bound = append(m.bound, t)
	}
	return nil
}

// exec runs the plan once on the values bound to the input nodes.
func (m *machine) exec() error {
	for i, st := range m.plan {
		if st.op == nil {
			v := st.node.Value()
			if v == nil {
				return fmt.Errorf("node %v has no value bound", st.node)
			}
			m.vals[i] = v
			continue
		}
		args := m.args[:0]
		for _, j := range st.args {
			args = append(args, m.vals[j])
		}
		var v G.Value
		var err error
		if pd := m.pd[i]; pd != nil {
			v, err = pd.UsePreallocDo(m.pre[i], args...)
		} else {
			v, err = st.op.Do(args...)
		}
		if err != nil {
			return fmt.Errorf("node %v (%v): %w", st.node, st.op, err)
		}
		m.vals[i] = v
	}
	return nil
}

// nodeLabel names node n of m in messages: its name, or "#i" (its index)
// when it has none, as onnxlite names it.
func nodeLabel(m *onnxlite.Model, n *onnxlite.Node) string {
	if n.Name != "" || m == nil || m.Graph == nil {
		return n.Name
	}
	for i, k := range m.Graph.Nodes {
		if k == n {
			return fmt.Sprintf("#%d", i)
		}
	}
	return n.Name
}

// gShape is the gorgonia shape of an ONNX shape: rank-0 values are held
// as one-element vectors.
func gShape(s []int) tensor.Shape {
	if len(s) == 0 {
		return tensor.Shape{1}
	}
	return append(tensor.Shape(nil), s...)
}

// needed returns the nodes, in order, that the values outs depend on.
func needed(nodes []*onnxlite.Node, outs []string) []*onnxlite.Node {
	need := map[string]bool{}
	for _, o := range outs {
		need[o] = true
	}
	keep := make([]bool, len(nodes))
	for i := len(nodes) - 1; i >= 0; i-- {
		for _, o := range nodes[i].Outputs {
			if o != "" && need[o] {
				keep[i] = true
			}
		}
		if keep[i] {
			for _, in := range nodes[i].Inputs {
				need[in] = true
			}
		}
	}
	var out []*onnxlite.Node
	for i, n := range nodes {
		if keep[i] {
			out = append(out, n)
		}
	}
	return out
}
