package nn

import (
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"strconv"

	"github.com/apportion/apportion/onnxlite"
)

// request says what a program computes: the named values (nil means the
// graph outputs) and, when grad is set, the gradient of Σ_i out[i, target[i]]
// of the single requested value with respect to run-time input wrt (an
// index into Network.feeds); held gives the values of the compile-time
// inputs, for which the program is specialised. With from set the program
// starts at that value instead of the run-time input: its nodes are those
// after the affine prefix that computes it (summed.go), and it is the
// program's one input (only for models of one run-time input and no
// compile-time ones).
type request struct {
	outputs []string
	grad    bool
	wrt     int
	held    *heldValues
	from    string
}

// appendKey appends a text that tells requests apart to b.
func (r request) appendKey(b []byte) []byte {
	for _, o := range r.outputs {
		b = strconv.AppendQuote(b, o)
	}
	b = strconv.AppendBool(append(b, '/'), r.grad)
	b = strconv.AppendInt(append(b, '/'), int64(r.wrt), 10)
	if r.held != nil {
		b = append(append(b, '/'), r.held.key...)
	}
	if r.from != "" {
		b = strconv.AppendQuote(append(b, "/from="...), r.from)
	}
	return b
}

// held holds the values of a call's compile-time inputs (Port.CompileTime)
// and a text that tells them apart, part of the program key.
type heldValues struct {
	values map[string]*onnxlite.Tensor
	key    string
}

// newHeld returns the held values of tensors (one per compile-time input,
// in order), converted to the declared element types.
func (nw *Network) newHeld(tensors []*onnxlite.Tensor) (*heldValues, error) {
	if len(nw.held) == 0 {
		return nil, nil
	}
	h := &heldValues{values: map[string]*onnxlite.Tensor{}}
	var key []byte
	for i, p := range nw.held {
		t := tensors[i]
		if t == nil {
			return nil, fmt.Errorf("input %q: %w: no value given; the model needs it to compile", p.Name, ErrBadRequest)
		}
		vals, err := t.Float64s()
		if err != nil {
			return nil, fmt.Errorf("input %q: %w: %v", p.Name, ErrBadRequest, err)
		}
		c, err := onnxlite.FromFloat64s(p.Name, p.DType, t.Dims, vals)
		if err != nil {
			return nil, fmt.Errorf("input %q: %w: expected %v values, got %v", p.Name, ErrBadRequest, p.DType, err)
		}
		if isFloat(p.DType) && p.DType == t.DType {
			c = &onnxlite.Tensor{Name: p.Name, DType: t.DType, Dims: t.Dims, Data: t.Data}
		}
		h.values[p.Name] = c
		key = strconv.AppendQuote(key, p.Name)
		key = fmt.Appendf(key, "%v=%v;", t.Dims, vals)
	}
	h.key = string(key)
	return h, nil
}

// program is one compiled configuration: exact input shapes and a request.
// A perSample program runs its batch-1 inner program once per sample.
type program struct {
	nw        *Network
	static    *onnxlite.Static
	inShapes  [][]int
	outNames  []string
	outShapes [][]int
	outTypes  []onnxlite.DataType
	req       request
	pool      *machinePool

	perSample bool
	inner     *program
	batch     int

	// varyingBytes is what checkValueBytes counted for the values that
	// are not constants: those that grow with the batch.
	varyingBytes int64
}

// describe fills the ports and the declared input shapes.
func (nw *Network) describe() error {
	g := nw.model.Graph
	inits := map[string]bool{}
	for _, t := range g.Initializers {
		inits[t.Name] = true
	}
	uses := onnxlite.InputUses(nw.model)
	for _, vi := range g.Inputs {
		if inits[vi.Name] {
			continue
		}
		p := Port{Name: vi.Name, CompileTime: uses[vi.Name].CompileTime()}
		if uses[vi.Name].Unread {
			// Nothing reads it: Forward takes any tensor for it and
			// ignores it.
			if vi.Type != nil {
				p.DType = vi.Type.Elem
			}
			if nw.unread == nil {
				nw.unread = map[int]bool{}
			}
			nw.unread[len(nw.inputs)] = true
			nw.inputs = append(nw.inputs, p)
			continue
		}
		var decl []int
		if vi.Type != nil {
			p.DType = vi.Type.Elem
			if vi.Type.HasShape {
				decl = make([]int, len(vi.Type.Shape))
				for j, d := range vi.Type.Shape {
					decl[j] = -1
					if d.HasValue {
						decl[j] = int(d.Value)
					}
				}
			}
		}
		if s, ok := nw.opts.InputShapes[vi.Name]; ok {
			if decl != nil && len(decl) != len(s)+1 {
				return fmt.Errorf("input %q: %w: Options.InputShapes gives per-sample shape %v (rank %d) but the model declares rank %d", vi.Name, ErrShape, s, len(s), len(decl))
			}
			if decl == nil {
				decl = make([]int, len(s)+1)
				decl[0] = -1
			}
			for j, d := range s {
				if decl[j+1] >= 0 && decl[j+1] != d {
					return fmt.Errorf("input %q: %w: Options.InputShapes gives %v but the model declares %s", vi.Name, ErrShape, s, shapeString(decl, true))
				}
				decl[j+1] = d
			}
		}
		if p.CompileTime {
			p.Shape = decl
			nw.inputs = append(nw.inputs, p)
			nw.held = append(nw.held, p)
			continue
		}
		if len(decl) > 0 {
			p.Shape = append([]int(nil), decl[1:]...)
		}
		nw.inputs = append(nw.inputs, p)
		nw.feeds = append(nw.feeds, p)
		nw.declared = append(nw.declared, decl)
	}
	for name := range nw.opts.InputShapes {
		found := false
		for _, p := range nw.inputs {
			found = found || p.Name == name
		}
		if !found {
			return fmt.Errorf("%w: Options.InputShapes names %q, which is not a runtime input (inputs: %s)", ErrBadRequest, name, portNames(nw.inputs))
		}
	}
	// Output shapes from inference at the smallest batch, when every
	// input shape is known and none is needed at compile time; the
	// declared types otherwise.
	var st *onnxlite.Static
	if shapes, ok := nw.sampleShapes(1); ok && len(nw.held) == 0 {
		if s, err := nw.inferFor(shapes, nil); err == nil {
			st = s
		}
	}
	for _, vi := range g.Outputs {
		p := Port{Name: vi.Name, Shape: nil}
		if vi.Type != nil {
			p.DType = vi.Type.Elem
		}
		if st != nil {
			if v, ok := st.Values[vi.Name]; ok && len(v.Shape) > 0 {
				p.Shape = append([]int(nil), v.Shape[1:]...)
				if p.DType == onnxlite.Undefined {
					p.DType = v.DType
				}
			}
		} else if vi.Type != nil && vi.Type.HasShape && len(vi.Type.Shape) > 0 {
			for _, d := range vi.Type.Shape[1:] {
				if d.HasValue {
					p.Shape = append(p.Shape, int(d.Value))
				} else {
					p.Shape = append(p.Shape, -1)
				}
			}
		}
		nw.outputs = append(nw.outputs, p)
	}
	return nil
}

// sampleShapes returns full input shapes at batch n (a declared fixed batch
// other than 1 is kept), or false when a non-batch dimension is unknown.
func (nw *Network) sampleShapes(n int) ([][]int, bool) {
	shapes := make([][]int, len(nw.declared))
	for i, decl := range nw.declared {
		if decl == nil {
			return nil, false
		}
		s := append([]int(nil), decl...)
		for j := range s {
			if j == 0 && (s[0] < 0 || s[0] == 1) {
				s[0] = n
				continue
			}
			if s[j] < 0 {
				return nil, false
			}
		}
		shapes[i] = s
	}
	return shapes, true
}

func (nw *Network) inputMap(shapes [][]int) map[string][]int {
	m := make(map[string][]int, len(shapes))
	for i, s := range shapes {
		m[nw.feeds[i].Name] = s
	}
	return m
}

// infer runs shape inference on m (the model or its relaxed copy) for
// exact run-time input shapes and the held values, folding every constant
// subgraph with the engine, within the network's limit on value bytes.
func (nw *Network) infer(m *onnxlite.Model, shapes [][]int, h *heldValues) (*onnxlite.Static, error) {
	opts := onnxlite.InferOptions{Shapes: nw.inputMap(shapes), Eval: nw.evaluator(), MaxValueBytes: nw.opts.MaxValueBytes}
	if h != nil {
		opts.Values = h.values
	}
	st, err := onnxlite.InferWith(m, opts)
	var le *onnxlite.LimitError
	if errors.As(err, &le) && le.Limit == "MaxValueBytes" {
		return nil, nw.tooLarge(shapes, le.Value, false, err)
	}
	return st, err
}

// inferFor runs shape inference for exact input shapes, relaxing a declared
// batch of one when the shapes ask for another batch. It reports an error
// when the relaxed graph is not batch-consistent.
func (nw *Network) inferFor(shapes [][]int, h *heldValues) (*onnxlite.Static, error) {
	relax, err := nw.needsRelax(shapes)
	if err != nil {
		return nil, err
	}
	if !relax {
		return nw.infer(nw.model, shapes, h)
	}
	return nw.inferRelaxed(shapes, h)
}

// needsRelax reports whether shapes ask for a batch other than a declared
// fixed batch of 1; other fixed batch mismatches are errors.
func (nw *Network) needsRelax(shapes [][]int) (bool, error) {
	relax := false
	for i, decl := range nw.declared {
		if len(decl) == 0 || decl[0] < 0 || len(shapes[i]) == 0 || shapes[i][0] == decl[0] {
			continue
		}
		if decl[0] != 1 {
			return false, fmt.Errorf("input %q: %w: the model fixes the batch dimension to %d, got shape %v", nw.feeds[i].Name, ErrShape, decl[0], shapes[i])
		}
		relax = true
	}
	return relax, nil
}

// inferRelaxed infers the relaxed model at the requested batch and at batch
// 1 and accepts the result only when every value that changed went from a
// leading dimension of 1 to the batch, all else equal, and every graph
// output carries the batch.
func (nw *Network) inferRelaxed(shapes [][]int, h *heldValues) (*onnxlite.Static, error) {
	n := -1
	one := make([][]int, len(shapes))
	for i, s := range shapes {
		one[i] = append([]int(nil), s...)
		if len(s) > 0 {
			if n < 0 {
				n = s[0]
			} else if s[0] != n {
				return nil, fmt.Errorf("%w: inputs disagree on the batch size: %d and %d", ErrShape, n, s[0])
			}
			one[i][0] = 1
		}
	}
	stN, err := nw.infer(nw.relaxed, shapes, h)
	if err != nil {
		return nil, err
	}
	st1, err := nw.infer(nw.relaxed, one, h)
	if err != nil {
		return nil, err
	}
	for name, vn := range stN.Values {
		v1, ok := st1.Values[name]
		if !ok {
			return nil, fmt.Errorf("%w: value %q exists at batch %d only", errBatchInconsistent, name, n)
		}
		if slices.Equal(v1.Shape, vn.Shape) {
			continue
		}
		if len(v1.Shape) != len(vn.Shape) || len(v1.Shape) == 0 || v1.Shape[0] != 1 || vn.Shape[0] != n || !slices.Equal(v1.Shape[1:], vn.Shape[1:]) {
			return nil, fmt.Errorf("%w: value %q has shape %v at batch 1 and %v at batch %d", errBatchInconsistent, name, v1.Shape, vn.Shape, n)
		}
	}
	for _, o := range stN.Outputs {
		s := stN.Values[o].Shape
		if len(s) == 0 || s[0] != n {
			return nil, fmt.Errorf("%w: output %q has shape %v at batch %d", errBatchInconsistent, o, s, n)
		}
	}
	return stN, nil
}

var errBatchInconsistent = errors.New("graph is not batch-consistent")

// ErrTooLarge is wrapped when the values of a program would take more than
// Options.MaxValueBytes; it wraps onnxlite.ErrLimit too.
var ErrTooLarge = fmt.Errorf("values too large for one program: %w", onnxlite.ErrLimit)

// checkValueBytes adds up the bytes of a program's values as the engine
// holds them (floating-point values in its element type, the others as
// int64), with, for a gradient program, one adjoint per floating-point
// value that is not a constant, and refuses a program over
// Options.MaxValueBytes before any of it is built. It returns the part of
// the total that is not constants.
func (nw *Network) checkValueBytes(st *onnxlite.Static, shapes [][]int, grad bool) (varying int64, err error) {
	float := int64(4)
	if nw.opts.DType == Float64 {
		float = 8
	}
	total := int64(0)
	for name, vs := range st.Values {
		n := int64(1)
		for _, d := range vs.Shape {
			n = min(n*int64(d), math.MaxInt64/64)
		}
		size := int64(8)
		_, isConst := st.Consts[name]
		if isFloat(vs.DType) {
			size = float
			if grad && !isConst {
				size *= 2
			}
		}
		total = min(total+n*size, math.MaxInt64/2)
		if !isConst {
			varying = min(varying+n*size, math.MaxInt64/2)
		}
	}
	if total > nw.opts.MaxValueBytes {
		return 0, nw.tooLarge(shapes, total, grad, nil)
	}
	return varying, nil
}

// tooLarge is the error of a program whose values need need bytes.
func (nw *Network) tooLarge(shapes [][]int, need int64, grad bool, cause error) error {
	what := "its values"
	if grad {
		what = "its values and their gradients"
	}
	err := fmt.Errorf("nn: the program for input shape %s needs more than %s for %s, over the limit of %s on one program: %w",
		shapeString(shapes[0], false), formatBytes(need), what, formatBytes(nw.opts.MaxValueBytes), ErrTooLarge)
	if cause != nil {
		err = fmt.Errorf("%w (%w)", err, cause)
	}
	return err
}

// formatBytes writes n bytes in the largest binary unit under it: 1.5 GiB.
func formatBytes(n int64) string {
	const unit = 1024
	if n < unit {
		return strconv.FormatInt(n, 10) + " bytes"
	}
	v, i := float64(n), -1
	for v >= unit && i < 3 {
		v /= unit
		i++
	}
	return strconv.FormatFloat(v, 'f', 1, 64) + " " + []string{"KiB", "MiB", "GiB", "TiB"}[i]
}

// relaxModel returns a copy of m in which every Reshape whose shape is a
// constant (initializer or Constant node) with a leading entry of 1 uses 0
// there instead ("copy the input's dimension"), so that a graph exported at
// batch 1 follows the batch. At batch 1 both graphs compute the same values
// whenever the Reshape's data has a leading dimension of 1; the caller checks
// that with shape inference before trusting the copy.
func relaxModel(m *onnxlite.Model) *onnxlite.Model {
	g := m.Graph
	consts := map[string]*onnxlite.Tensor{}
	for _, t := range g.Initializers {
		consts[t.Name] = t
	}
	for _, n := range g.Nodes {
		if n.OpType == "Constant" && len(n.Outputs) == 1 {
			if a := n.Attr("value"); a != nil && a.T != nil {
				consts[n.Outputs[0]] = a.T
			}
		}
	}
	cp := *m
	gc := *g
	gc.Nodes = make([]*onnxlite.Node, len(g.Nodes))
	gc.Initializers = append([]*onnxlite.Tensor(nil), g.Initializers...)
	changed := false
	for i, n := range g.Nodes {
		gc.Nodes[i] = n
		if n.OpType != "Reshape" || len(n.Inputs) < 2 || n.AttrInt("allowzero", 0) != 0 {
			continue
		}
		t := consts[n.Inputs[1]]
		if t == nil {
			continue
		}
		vals, ok := t.Data.([]int64)
		if !ok || len(vals) < 2 || vals[0] != 1 {
			continue
		}
		nv := append([]int64(nil), vals...)
		nv[0] = 0
		name := fmt.Sprintf("%s__nn_batch_relaxed_%d", n.Inputs[1], i)
		gc.Initializers = append(gc.Initializers, &onnxlite.Tensor{Name: name, DType: onnxlite.Int64, Dims: append([]int64(nil), t.Dims...), Data: nv})
		nn := *n
		nn.Inputs = append([]string(nil), n.Inputs...)
		nn.Inputs[1] = name
		gc.Nodes[i] = &nn
		changed = true
	}
	// The declared batch of one becomes symbolic.
	relaxVI := func(vis []*onnxlite.ValueInfo) []*onnxlite.ValueInfo {
		out := make([]*onnxlite.ValueInfo, len(vis))
		for i, vi := range vis {
			out[i] = vi
			if vi.Type == nil || !vi.Type.HasShape || len(vi.Type.Shape) == 0 {
				continue
			}
			d := vi.Type.Shape[0]
			if !d.HasValue || d.Value != 1 {
				continue
			}
			t := *vi.Type
			t.Shape = append([]onnxlite.Dim(nil), vi.Type.Shape...)
			t.Shape[0] = onnxlite.Dim{Param: "nn_batch"}
			v := *vi
			v.Type = &t
			out[i] = &v
			changed = true
		}
		return out
	}
	gc.Inputs = relaxVI(g.Inputs)
	gc.Outputs = relaxVI(g.Outputs)
	gc.ValueInfo = relaxVI(g.ValueInfo)
	if !changed {
		return m
	}
	cp.Graph = &gc
	return &cp
}

// program returns the cached program for shapes and req, compiling it on
// first use.
func (nw *Network) program(shapes [][]int, req request) (*program, error) {
	// The key is built without fmt and looked up without a string copy:
	// this runs on every call.
	var buf [128]byte
	kb := buf[:0]
	for _, s := range shapes {
		kb = append(kb, '[')
		for _, d := range s {
			kb = append(strconv.AppendInt(kb, int64(d), 10), ' ')
		}
		kb = append(kb, ']')
	}
	kb = req.appendKey(kb)
	nw.mu.Lock()
	p, ok := nw.progs[string(kb)]
	nw.mu.Unlock()
	if ok {
		return p, nil
	}
	key := string(kb)
	p, err := nw.newProgram(shapes, req)
	if err != nil {
		return nil, err
	}
	nw.mu.Lock()
	defer nw.mu.Unlock()
	if q, ok := nw.progs[key]; ok {
		return q, nil
	}
	if req.held != nil {
		if nw.heldProgs >= maxHeldPrograms {
			// Forget the programs of other values (their machines go
			// with them once their runs end).
			for k, q := range nw.progs {
				if q.req.held != nil {
					delete(nw.progs, k)
				}
			}
			nw.heldProgs = 0
		}
		nw.heldProgs++
	}
	nw.progs[key] = p
	return p, nil
}

// maxHeldPrograms bounds the programs a Network keeps for the values of its
// compile-time inputs: past it, those programs are dropped and compiled
// again when asked for, so that a caller cycling through many values
// cannot grow the cache without bound.
const maxHeldPrograms = 64

func (nw *Network) newProgram(shapes [][]int, req request) (*program, error) {
	inShapes := shapes
	if req.from != "" {
		// Shapes are inferred from the runtime input's.
		var ok bool
		if inShapes, ok = nw.sampleShapes(shapes[0][0]); !ok {
			return nil, fmt.Errorf("%w: the input's per-sample shape is not known", ErrShape)
		}
	}
	relax, err := nw.needsRelax(inShapes)
	if err != nil {
		return nil, err
	}
	var st *onnxlite.Static
	if relax {
		st, err = nw.inferRelaxed(inShapes, req.held)
		if errors.Is(err, errBatchInconsistent) || (err != nil && !errors.Is(err, ErrShape)) {
			// Run sample by sample on the model as exported.
			one := make([][]int, len(shapes))
			for i, s := range shapes {
				one[i] = append([]int(nil), s...)
				one[i][0] = 1
			}
			inner, err := nw.program(one, req)
			if err != nil {
				return nil, err
			}
			return &program{nw: nw, perSample: true, inner: inner, batch: shapes[0][0], inShapes: shapes, req: req,
				outNames: inner.outNames, outTypes: inner.outTypes}, nil
		}
	} else {
		st, err = nw.infer(nw.model, inShapes, req.held)
	}
	if err != nil {
		return nil, err
	}
	if req.from != "" {
		if st, err = suffixStatic(st, req.from); err != nil {
			return nil, err
		}
	}
	varying, err := nw.checkValueBytes(st, shapes, req.grad)
	if err != nil {
		return nil, err
	}
	p := &program{nw: nw, static: st, inShapes: shapes, req: req, varyingBytes: varying}
	p.outNames = req.outputs
	if p.outNames == nil {
		p.outNames = st.Outputs
	}
	for _, o := range p.outNames {
		v, ok := st.Values[o]
		if !ok {
			return nil, fmt.Errorf("%w: no value %q in the graph", ErrBadRequest, o)
		}
		if !numeric(v.DType) {
			return nil, fmt.Errorf("%w: output %q of element type %v", onnxlite.ErrUnsupported, o, v.DType)
		}
		p.outShapes = append(p.outShapes, v.Shape)
		p.outTypes = append(p.outTypes, v.DType)
	}
	if req.outputs == nil {
		nw.mu.Lock()
		if nw.outTypes == nil {
			nw.outTypes = p.outTypes
		}
		nw.mu.Unlock()
	}
	if req.grad {
		if req.wrt < 0 || req.wrt >= len(st.Inputs) {
			return nil, fmt.Errorf("%w: gradient with respect to run-time input %d of %d", ErrBadRequest, req.wrt, len(st.Inputs))
		}
		if len(p.outNames) != 1 || len(p.outShapes[0]) == 0 {
			return nil, fmt.Errorf("%w: gradients need one batched output", ErrBadRequest)
		}
	}
	p.pool = newMachinePool(nw.opts.Machines, p.build)
	return p, nil
}

// isFloat reports whether dt is a floating-point type.
func isFloat(dt onnxlite.DataType) bool {
	return dt == onnxlite.Float || dt == onnxlite.Double || dt == onnxlite.Float16 || dt == onnxlite.BFloat16
}

// numeric reports whether the engine holds values of type dt: floating
// point, integer or boolean, all as floating-point numbers.
func numeric(dt onnxlite.DataType) bool {
	switch dt {
	case onnxlite.String, onnxlite.Complex64, onnxlite.Complex128, onnxlite.Undefined:
		return false
	}
	return true
}

// run executes p on data (one flat slice per runtime input). When p.req.grad
// is set, mask (the one-hot selection, shaped like the output) must be given
// and grad returns the gradient w.r.t. the first input.
func (p *program) run(ctx context.Context, data [][]float64, mask []float64) (outs [][]float64, grad []float64, err error) {
	if p.perSample {
		return p.runPerSample(ctx, data, mask)
	}
	m, err := p.pool.acquire(ctx)
	if err != nil {
		return nil, nil, err
	}
	// A run that fails, or panics on its way to the caller's recovery,
	// may leave the machine half-way: it is dropped, not released.
	ok := false
	defer func() { p.pool.release(m, ok) }()
	outs, grad, err = m.run(p, data, mask)
	if err != nil {
		return nil, nil, err
	}
	ok = true
	return outs, grad, nil
}

func (p *program) runPerSample(ctx context.Context, data [][]float64, mask []float64) (outs [][]float64, grad []float64, err error) {
	in := p.inner
	sizes := make([]int, len(data))
	for i, s := range in.inShapes {
		sizes[i] = prod(s)
	}
	var outSizes []int
	for _, s := range in.outShapes {
		outSizes = append(outSizes, prod(s))
	}
	outs = make([][]float64, len(outSizes))
	sub := make([][]float64, len(data))
	for b := 0; b < p.batch; b++ {
		if err := ctx.Err(); err != nil {
			return nil, nil, err
		}
		for i := range data {
			sub[i] = data[i][b*sizes[i] : (b+1)*sizes[i]]
		}
		var m []float64
		if mask != nil {
			m = mask[b*outSizes[0] : (b+1)*outSizes[0]]
		}
		o, g, err := in.run(ctx, sub, m)
		if err != nil {
			return nil, nil, err
		}
		for i := range o {
			outs[i] = append(outs[i], o[i]...)
		}
		grad = append(grad, g...)
	}
	return outs, grad, nil
}

// outputShapes returns the full output shapes of p.
func (p *program) outputShapes() [][]int {
	if !p.perSample {
		return p.outShapes
	}
	out := make([][]int, len(p.inner.outShapes))
	for i, s := range p.inner.outShapes {
		s = append([]int(nil), s...)
		if len(s) > 0 {
			s[0] *= p.batch
		}
		out[i] = s
	}
	return out
}

// runReq runs shapes/data through the programs for req, splitting the
// batch (first dimension of every input) into chunks of at most
// Options.MaxBatch samples, and into Options.Parallel concurrent parts when
// the batch is large enough (see runSplit). mask, when given, is split with
// the outputs.
func (nw *Network) runReq(ctx context.Context, shapes [][]int, data [][]float64, req request, mask []float64) ([][]float64, [][]int, []float64, error) {
	if err := ctx.Err(); err != nil {
		return nil, nil, nil, err
	}
	n := -1
	for _, s := range shapes {
		if len(s) == 0 {
			n = -1
			break
		}
		if n < 0 {
			n = s[0]
		} else if s[0] != n {
			n = -1
			break
		}
	}
	if parts := nw.splitParts(n); parts > 1 && len(shapes) > 0 {
		return nw.runSplit(ctx, shapes, data, req, mask, n, parts)
	}
	return nw.runReqSeq(ctx, shapes, data, req, mask, n)
}

// runReqSeq runs the batch of n samples (-1 when the inputs do not share a
// first dimension) on the caller's goroutine, in chunks of at most
// Options.MaxBatch samples, or of the sizes grownChunk picks.
func (nw *Network) runReqSeq(ctx context.Context, shapes [][]int, data [][]float64, req request, mask []float64, n int) ([][]float64, [][]int, []float64, error) {
	chunk := nw.opts.MaxBatch
	if n <= chunk || len(shapes) == 0 {
		p, err := nw.program(shapes, req)
		if err != nil {
			return nil, nil, nil, err
		}
		o, g, err := p.run(ctx, data, mask)
		return o, p.outputShapes(), g, err
	}
	var outs [][]float64
	var outShapes [][]int
	var grad []float64
	for start, end := 0, 0; start < n; start = end {
		if err := ctx.Err(); err != nil {
			return nil, nil, nil, err
		}
		end = start + nw.grownChunk(shapes, req, n-start)
		cs := make([][]int, len(shapes))
		cd := make([][]float64, len(shapes))
		for i, s := range shapes {
			per := prod(s[1:])
			cs[i] = append([]int{end - start}, s[1:]...)
			cd[i] = data[i][start*per : end*per]
		}
		p, err := nw.program(cs, req)
		if err != nil {
			return nil, nil, nil, err
		}
		var cm []float64
		shp := p.outputShapes()
		if mask != nil {
			per := prod(shp[0][1:])
			cm = mask[start*per : end*per]
		}
		o, g, err := p.run(ctx, cd, cm)
		if err != nil {
			return nil, nil, nil, err
		}
		if outs == nil {
			outs = make([][]float64, len(o))
			outShapes = make([][]int, len(o))
			for i, s := range shp {
				if len(s) == 0 || s[0] != end-start {
					return nil, nil, nil, fmt.Errorf("%w: output %q has shape %v for a chunk of %d samples; run it with at most Options.MaxBatch = %d samples", ErrShape, p.outNames[i], s, end-start, chunk)
				}
				outShapes[i] = append([]int{n}, s[1:]...)
			}
		}
		for i := range o {
			outs[i] = append(outs[i], o[i]...)
		}
		grad = append(grad, g...)
	}
	return outs, outShapes, grad, nil
}

// Grown chunks: with Options.MaxBatch left at zero, a batch of more than
// DefaultMaxBatch samples runs in chunks of DefaultMaxBatch·2^j samples,
// up to maxGrownBatch, as long as a chunk's varying values (checkValueBytes,
// of the DefaultMaxBatch program) take at most grownBatchBytes; the last
// fewer than DefaultMaxBatch samples run as one chunk. Small dense models
// spend much of a 64-sample run outside their products (the ops' calls,
// the program's bookkeeping), which a larger chunk spreads over more
// samples: forward at batch 1024 took 22% less time on mlp-s and 7% less
// on mlp-m in grown chunks than in chunks of 64 (Intel Xeon with AVX-512,
// one thread, medians of four alternating runs), with the same
// bits, since a sample's results do not depend on its batch. Chunk sizes
// stay powers of two times the default so that a Network compiles few
// programs whatever the batch sizes it is asked to run.
const (
	maxGrownBatch   = 1024
	grownBatchBytes = 4 << 20
)

// grownChunk returns the size of the next chunk of a batch with rest
// samples left to run, rest > Options.MaxBatch or the last chunk.
func (nw *Network) grownChunk(shapes [][]int, req request, rest int) int {
	chunk := nw.opts.MaxBatch
	if !nw.growChunks || rest < 2*chunk {
		return min(chunk, rest)
	}
	p, err := nw.program(splitShapes(shapes, chunk), req)
	if err != nil || p.perSample {
		// The chunk's own run reports the error.
		return chunk
	}
	per := max(p.varyingBytes/int64(chunk), 1)
	size := chunk
	for 2*size <= min(rest, maxGrownBatch) && int64(2*size)*per <= nw.grownBytes {
		size *= 2
	}
	return size
}
