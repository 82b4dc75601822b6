package main

import (
	"hash/fnv"
	"math"
	"math/rand/v2"

	"github.com/apportion/apportion/onnxlite"
)

// kase is one reference case: a graph, the data of its inputs and what it
// checks.
type kase struct {
	name     string
	group    string // "node" or "model": the directory under testdata/ort
	ops      []string
	opset    int64
	revision string
	kind     string
	checks   string

	g     *onnxlite.Graph
	data  []*onnxlite.Tensor // one per graph input, in graph order
	roles map[string]string  // integer inputs: "shape" or "indices"

	// twin, when set, is the graph ONNX Runtime runs instead of g, declared
	// at twinOpset (see bfloat16Twin).
	twin      *onnxlite.Graph
	twinOpset int64

	// batch, when positive, declares the leading dimension of every input
	// and output symbolic ("N") and is the number of rows of the data.
	batch int64
	rng   *rand.Rand
}

// The case kinds (see entry.Kind).
const (
	semantic   = "semantic"
	typeOnly   = "type-only"
	newOp      = "new-operator"
	unrevised  = "unrevised"
	shapeInput = "shape-input"
	indices    = "indices"
	dtype      = "dtype"
	wholeModel = "model"
)

// newCase starts a single-operator case under node/. revision is the
// operator revision the opset selects; checks says what the case exercises.
func newCase(name string, opset int64, kind, revision, checks string, ops ...string) *kase {
	h := fnv.New64a()
	h.Write([]byte(name))
	return &kase{
		name: name, group: "node", ops: ops, opset: opset, revision: revision, kind: kind, checks: checks,
		g:     &onnxlite.Graph{Name: name},
		roles: map[string]string{},
		rng:   rand.New(rand.NewPCG(h.Sum64(), 0x0a7)),
	}
}

func tensorType(dt onnxlite.DataType, dims []onnxlite.Dim) *onnxlite.Type {
	return &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: dt, HasShape: dims != nil, Shape: dims}
}

// in adds a graph input with its data. With c.batch set, dims[0] must be
// c.batch and is declared as the symbolic dimension "N".
func (c *kase) in(name string, dt onnxlite.DataType, dims []int64, data any) string {
	shape := make([]onnxlite.Dim, len(dims))
	for i, d := range dims {
		shape[i] = onnxlite.Dim{Value: d, HasValue: true}
	}
	if c.batch > 0 {
		if len(dims) == 0 || dims[0] != c.batch {
			panic("input " + name + " does not lead with the batch")
		}
		shape[0] = onnxlite.Dim{Param: "N"}
	}
	c.g.Inputs = append(c.g.Inputs, &onnxlite.ValueInfo{Name: name, Type: tensorType(dt, shape)})
	c.data = append(c.data, &onnxlite.Tensor{Name: name, DType: dt, Dims: dims, Data: data})
	return name
}

// floatIn adds a float input of uniform values in [-2, 2].
func (c *kase) floatIn(name string, dims ...int64) string {
	return c.in(name, onnxlite.Float, dims, c.uniform(numel(dims), -2, 2))
}

// floatInRange adds a float input of uniform values in [lo, hi].
func (c *kase) floatInRange(name string, lo, hi float64, dims ...int64) string {
	return c.in(name, onnxlite.Float, dims, c.uniform(numel(dims), lo, hi))
}

// int64In adds an int64 input; role is "shape" or "indices".
func (c *kase) int64In(name, role string, dims []int64, data []int64) string {
	c.roles[name] = role
	return c.in(name, onnxlite.Int64, dims, data)
}

// init adds an initializer.
func (c *kase) init(name string, dt onnxlite.DataType, dims []int64, data any) string {
	c.g.Initializers = append(c.g.Initializers, &onnxlite.Tensor{Name: name, DType: dt, Dims: dims, Data: data})
	return name
}

// ints adds a 1-D int64 initializer.
func (c *kase) ints(name string, v ...int64) string {
	return c.init(name, onnxlite.Int64, []int64{int64(len(v))}, v)
}

// floats adds a float initializer of the given shape.
func (c *kase) floats(name string, dims []int64, v ...float32) string {
	if int64(len(v)) != numel(dims) {
		panic("initializer " + name + ": data does not match its shape")
	}
	return c.init(name, onnxlite.Float, dims, v)
}

// scalar adds a float scalar initializer.
func (c *kase) scalar(name string, v float32) string {
	return c.init(name, onnxlite.Float, []int64{}, []float32{v})
}

// randInit adds a float initializer of uniform values in [lo, hi].
func (c *kase) randInit(name string, lo, hi float64, dims ...int64) string {
	return c.init(name, onnxlite.Float, dims, c.uniform(numel(dims), lo, hi))
}

// weights adds a float initializer drawn uniformly from ±√(6/fanIn)
// (He et al. 2015, uniform variant of eq. 10), as bench/zoo.go does.
func (c *kase) weights(name string, fanIn int64, dims ...int64) string {
	lim := math.Sqrt(6 / float64(fanIn))
	return c.randInit(name, -lim, lim, dims...)
}

// node appends a node; its name is its first output.
func (c *kase) node(op string, ins, outs []string, attrs ...*onnxlite.Attribute) string {
	c.g.Nodes = append(c.g.Nodes, &onnxlite.Node{Name: outs[0], OpType: op, Inputs: ins, Outputs: outs, Attrs: attrs})
	return outs[0]
}

// op appends a node with one output.
func (c *kase) op(op, out string, ins []string, attrs ...*onnxlite.Attribute) string {
	return c.node(op, ins, []string{out}, attrs...)
}

// out declares graph outputs of element type dt (shapes left to the runtime).
func (c *kase) out(dt onnxlite.DataType, names ...string) {
	for _, n := range names {
		c.g.Outputs = append(c.g.Outputs, &onnxlite.ValueInfo{Name: n, Type: tensorType(dt, nil)})
	}
}

// uniform returns n values uniform in [lo, hi], rounded to float32.
func (c *kase) uniform(n int64, lo, hi float64) []float32 {
	v := make([]float32, n)
	for i := range v {
		v[i] = float32(lo + (hi-lo)*c.rng.Float64())
	}
	return v
}

// grid returns n values drawn uniformly from the multiples of step in
// [lo, hi]: values that repeat exactly, for Equal and ties.
func (c *kase) grid(n int64, step, lo, hi float64) []float32 {
	k := int(math.Floor((hi-lo)/step)) + 1
	v := make([]float32, n)
	for i := range v {
		v[i] = float32(lo + step*float64(c.rng.IntN(k)))
	}
	return v
}

// avoid moves every value closer than margin to one of kinks to
// kink ± margin (on the side it was on), so that float32 and float64
// evaluations, and finite differences, stay on one side of a kink.
func avoid(v []float32, margin float64, kinks ...float64) []float32 {
	for i, x := range v {
		for _, k := range kinks {
			d := float64(x) - k
			if math.Abs(d) < margin {
				if d < 0 {
					v[i] = float32(k - margin)
				} else {
					v[i] = float32(k + margin)
				}
			}
		}
	}
	return v
}

func numel(dims []int64) int64 {
	n := int64(1)
	for _, d := range dims {
		n *= d
	}
	return n
}

func attrInt(name string, v int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInt, I: v}
}

func attrFloat(name string, v float32) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrFloat, F: v}
}

func attrString(name, v string) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrString, S: v}
}

func attrInts(name string, v ...int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInts, Ints: v}
}

func attrFloats(name string, v ...float32) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrFloats, Floats: v}
}

func attrTensor(name string, t *onnxlite.Tensor) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrTensor, T: t}
}
