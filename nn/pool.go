package nn

import (
	"context"
	"fmt"
	"hash"
	"hash/fnv"

	"github.com/chewxy/hm"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

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

func newMachinePool(max int, build func() (*machine, error)) *machinePool {
	if max < 1 {
		max = 1
	}
	return &machinePool{build: build, idle: make(chan *machine, max), slots: make(chan struct{}, max)}
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
		m, err := mp.build()
		if err != nil {
			<-mp.slots
			return nil, err
		}
		return m, nil
	case <-ctx.Done():
		return nil, ctx.Err()
	}
}

// release returns m to the pool, or discards it (freeing its slot) when the
// run that used it failed.
func (mp *machinePool) release(m *machine, ok bool) {
	if !ok {
		if m != nil && m.vm != nil {
			m.vm.Close()
		}
		<-mp.slots
		return
	}
	mp.idle <- m
}

// machine is one gorgonia graph of a program with its tape machine.
type machine struct {
	g       *G.ExprGraph
	vm      G.VM
	dt      tensor.Dtype
	inputs  []*G.Node
	outputs []*G.Node
	mask    *G.Node
	grad    *G.Node
}

// build translates the program's graph into a fresh gorgonia graph.
func (p *program) build() (m *machine, err error) {
	defer coreRecover("building program", &err)
	dt := tensor.Float32
	if p.nw.opts.DType == Float64 {
		dt = tensor.Float64
	}
	b := newCoreBuilder(p.static, dt, p.nw.model)
	m = &machine{g: b.g, dt: dt}
	for i, name := range p.static.Inputs {
		shape := p.inShapes[i]
		if v, ok := p.static.Values[name]; ok {
			shape = v.Shape
		}
		gs := coreGShape(shape)
		n := G.NewTensor(b.g, dt, len(gs), G.WithShape(gs...), G.WithName("input:"+name))
		b.vals[name] = n
		m.inputs = append(m.inputs, n)
	}
	for _, n := range coreNeeded(p.static.Nodes, p.outNames) {
		if err := b.node(n); err != nil {
			return nil, fmt.Errorf("node %q (%s): %w", n.Name, n.OpType, err)
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
		shape := p.outShapes[0]
		rows := shape[0]
		cols := prod(shape[1:])
		flat := out
		if !coreEqualInts(out.Shape(), []int{rows, cols}) {
			if flat, err = G.Reshape(out, tensor.Shape{rows, cols}); err != nil {
				return nil, fmt.Errorf("flattening output %q: %w", p.outNames[0], err)
			}
		}
		m.mask = G.NewTensor(b.g, dt, 2, G.WithShape(rows, cols), G.WithName("selection-mask"))
		sel, err := G.HadamardProd(flat, m.mask)
		if err != nil {
			return nil, fmt.Errorf("masking output: %w", err)
		}
		loss, err := G.Sum(sel)
		if err != nil {
			return nil, fmt.Errorf("summing selected outputs: %w", err)
		}
		grads, err := G.Grad(loss, m.inputs[0])
		if err != nil {
			return nil, fmt.Errorf("differentiating output %q w.r.t. input %q: %w", p.outNames[0], p.static.Inputs[0], err)
		}
		m.grad = grads[0]
	}
	keep := append(G.Nodes(nil), m.outputs...)
	if m.grad != nil {
		keep = append(keep, m.grad)
	}
	if _, err := G.ApplyOp(newKeepAlive(keep), keep...); err != nil {
		return nil, fmt.Errorf("pinning outputs: %w", err)
	}
	m.vm = G.NewTapeMachine(b.g)
	return m, nil
}

// run binds data, runs the tape once and copies the results out. The machine
// is reset first, so no state leaks from one run to the next.
func (m *machine) run(p *program, data [][]float64, mask []float64) (outs [][]float64, grad []float64, err error) {
	m.vm.Reset()
	for i, n := range m.inputs {
		if err := G.Let(n, coreDense(m.dt, n.Shape(), data[i])); err != nil {
			return nil, nil, fmt.Errorf("%w: binding input %q: %v", ErrEngine, p.static.Inputs[i], err)
		}
	}
	if m.mask != nil {
		if err := G.Let(m.mask, coreDense(m.dt, m.mask.Shape(), mask)); err != nil {
			return nil, nil, fmt.Errorf("%w: binding the selection mask: %v", ErrEngine, err)
		}
	}
	if err := m.vm.RunAll(); err != nil {
		return nil, nil, fmt.Errorf("%w: %v", ErrEngine, err)
	}
	outs = make([][]float64, len(m.outputs))
	for i, n := range m.outputs {
		if outs[i], err = coreValueFloats(n.Value()); err != nil {
			return nil, nil, fmt.Errorf("%w: output %q: %v", ErrEngine, p.outNames[i], err)
		}
		if want := prod(p.outShapes[i]); len(outs[i]) != want {
			return nil, nil, fmt.Errorf("%w: output %q has %d values, shape inference expects %v", ErrEngine, p.outNames[i], len(outs[i]), p.outShapes[i])
		}
	}
	if m.grad != nil {
		if grad, err = coreValueFloats(m.grad.Value()); err != nil {
			return nil, nil, fmt.Errorf("%w: gradient: %v", ErrEngine, err)
		}
		if len(grad) != len(data[0]) {
			return nil, nil, fmt.Errorf("%w: gradient has %d values, the input %d", ErrEngine, len(grad), len(data[0]))
		}
	}
	return outs, grad, nil
}

// coreGShape is the gorgonia shape of an ONNX shape: rank-0 values are held
// as one-element vectors.
func coreGShape(s []int) tensor.Shape {
	if len(s) == 0 {
		return tensor.Shape{1}
	}
	return append(tensor.Shape(nil), s...)
}

// coreDense makes a tensor of element type dt holding vals.
func coreDense(dt tensor.Dtype, shape tensor.Shape, vals []float64) *tensor.Dense {
	if dt == tensor.Float64 {
		return tensor.New(tensor.WithShape(shape.Clone()...), tensor.WithBacking(append([]float64(nil), vals...)))
	}
	f := make([]float32, len(vals))
	for i, v := range vals {
		f[i] = float32(v)
	}
	return tensor.New(tensor.WithShape(shape.Clone()...), tensor.WithBacking(f))
}

// coreValueFloats copies a gorgonia value into a new row-major float64 slice.
func coreValueFloats(v G.Value) ([]float64, error) {
	switch t := v.(type) {
	case nil:
		return nil, fmt.Errorf("no value computed")
	case *tensor.Dense:
		if t.RequiresIterator() {
			t = t.Materialize().(*tensor.Dense)
		}
		switch d := t.Data().(type) {
		case []float64:
			return append([]float64(nil), d...), nil
		case []float32:
			out := make([]float64, len(d))
			for i, x := range d {
				out[i] = float64(x)
			}
			return out, nil
		case float64:
			return []float64{d}, nil
		case float32:
			return []float64{float64(d)}, nil
		}
		return nil, fmt.Errorf("unexpected data %T", t.Data())
	case *G.F64:
		return []float64{float64(*t)}, nil
	case *G.F32:
		return []float64{float64(*t)}, nil
	}
	return nil, fmt.Errorf("unexpected value %T", v)
}

// coreKeepAliveOp reads every value a run returns and does nothing else.
// gorgonia lets an op declared as overwriting its input reuse that input's
// memory once no later instruction reads it; a requested value that is also
// fed to such an op (logits into an in-place softmax, say) would otherwise be
// overwritten before it is copied out. The tape runs this op last.
type coreKeepAliveOp struct{ types []hm.Type }

func newKeepAlive(ns G.Nodes) coreKeepAliveOp {
	op := coreKeepAliveOp{}
	for _, n := range ns {
		op.types = append(op.types, n.Type())
	}
	return op
}

func (op coreKeepAliveOp) Arity() int { return len(op.types) }
func (op coreKeepAliveOp) Type() hm.Type {
	return hm.NewFnType(append(append([]hm.Type(nil), op.types...), op.types[0])...)
}
func (op coreKeepAliveOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	s, ok := in[0].(tensor.Shape)
	if !ok {
		return nil, fmt.Errorf("keep-alive: input has no shape")
	}
	return s.Clone(), nil
}

// Do returns its first input unchanged (the result is never read).
func (op coreKeepAliveOp) Do(vs ...G.Value) (G.Value, error) { return vs[0], nil }
func (op coreKeepAliveOp) ReturnsPtr() bool                  { return false }
func (op coreKeepAliveOp) CallsExtern() bool                 { return false }
func (op coreKeepAliveOp) OverwritesInput() int              { return -1 }
func (op coreKeepAliveOp) WriteHash(h hash.Hash)             { fmt.Fprintf(h, "coreKeepAlive{%d}", len(op.types)) }
func (op coreKeepAliveOp) Hashcode() uint32 {
	h := fnv.New32a()
	op.WriteHash(h)
	return h.Sum32()
}
func (op coreKeepAliveOp) String() string { return fmt.Sprintf("coreKeepAlive{%d}", len(op.types)) }

// coreNeeded returns the nodes, in order, that the values outs depend on.
func coreNeeded(nodes []*onnxlite.Node, outs []string) []*onnxlite.Node {
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
