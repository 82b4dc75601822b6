package explain

import (
	"fmt"
	"math"
	"math/rand/v2"
	"sync"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/onnxlite"
)

// weighted are the operators whose initializer inputs are a layer's
// learned weights. Other initializers (the constants of a Sub or Div that
// standardise the input, shapes, axes) are not a layer's.
var weighted = map[string]bool{"Conv": true, "ConvTranspose": true, "Gemm": true, "MatMul": true}

// layer is a node with learned weights and the indices of its
// floating-point initializers in the graph.
type layer struct {
	name  string
	inits []int
}

// layers returns the model's layers in graph order.
func (m *Model) layers() []layer {
	g := m.Graph.Graph
	at := make(map[string]int, len(g.Initializers))
	for i, t := range g.Initializers {
		switch t.DType {
		case onnxlite.Float, onnxlite.Double:
			at[t.Name] = i
		}
	}
	var out []layer
	for k, n := range g.Nodes {
		if !weighted[n.OpType] || n.Domain != "" {
			continue
		}
		l := layer{name: n.Name}
		if l.name == "" {
			l.name = fmt.Sprintf("%s %d", n.OpType, k)
		}
		for _, in := range n.Inputs {
			if i, ok := at[in]; ok {
				l.inits = append(l.inits, i)
			}
		}
		if len(l.inits) > 0 {
			out = append(out, l)
		}
	}
	return out
}

// Layers names the model's layers with learned weights (Conv,
// ConvTranspose, Gemm and MatMul nodes with float or double initializer
// inputs), from the
// input to the output: the layers Randomize randomizes.
func (m *Model) Layers() []string {
	ls := m.layers()
	names := make([]string, len(ls))
	for i, l := range ls {
		names[i] = l.name
	}
	return names
}

// Randomize returns a copy of the model whose last depth layers (see
// Layers) have random weights: each of their initializers replaced by
// draws of the same shape and scale, N(0, rms²) where rms is the root mean
// square of the trained values, from a PCG generator seeded by (seed,
// the initializer's index). The copy is not compiled; the model itself is
// not modified. This is the cascading randomization of Adebayo et al.
// 2018, from the output layer down.
func (m *Model) Randomize(depth int, seed uint64) (*Model, error) {
	ls := m.layers()
	if depth < 0 || depth > len(ls) {
		return nil, fmt.Errorf("randomizing %d layers: the model has %d layers with weights", depth, len(ls))
	}
	g := *m.Graph.Graph
	g.Initializers = append([]*onnxlite.Tensor(nil), g.Initializers...)
	for _, l := range ls[len(ls)-depth:] {
		for _, i := range l.inits {
			t, err := randomTensor(g.Initializers[i], seed, uint64(i))
			if err != nil {
				return nil, err
			}
			g.Initializers[i] = t
		}
	}
	cp := *m.Graph
	cp.Graph = &g
	return &Model{Name: fmt.Sprintf("%s with %d layers randomized", m.Name, depth), SHA256: m.SHA256, Graph: &cp, Meta: m.Meta}, nil
}

// randomTensor returns a tensor of t's name, type and shape holding
// N(0, rms(t)²) draws.
func randomTensor(t *onnxlite.Tensor, seed, stream uint64) (*onnxlite.Tensor, error) {
	v, err := t.Float64s()
	if err != nil {
		return nil, err
	}
	ss := 0.0
	for _, x := range v {
		ss += x * x
	}
	rms := 0.0
	if len(v) > 0 {
		rms = math.Sqrt(ss / float64(len(v)))
	}
	rng := rand.New(rand.NewPCG(seed, stream))
	for i := range v {
		v[i] = rms * rng.NormFloat64()
	}
	var data any = v
	if t.DType == onnxlite.Float {
		f := make([]float32, len(v))
		for i, x := range v {
			f[i] = float32(x)
		}
		data = f
	}
	return onnxlite.NewTensor(t.Name, t.DType, append([]int64(nil), t.Dims...), data)
}

// Cascade returns the models of the randomization cascade as the output
// selected by output and logits (see Head), each compiled with opt on first
// use and kept: cascade(d) has the last d layers randomized by seed.
func (m *Model) Cascade(output string, logits bool, seed uint64, opt CompileOptions) func(depth int) (gradattr.Model, error) {
	var mu sync.Mutex
	heads := map[int]gradattr.Model{}
	return func(depth int) (gradattr.Model, error) {
		mu.Lock()
		defer mu.Unlock()
		if h, ok := heads[depth]; ok {
			return h, nil
		}
		r, err := m.Randomize(depth, seed)
		if err != nil {
			return nil, err
		}
		if err := r.Compile(opt); err != nil {
			return nil, err
		}
		h, err := r.Head(output, logits)
		if err != nil {
			return nil, err
		}
		heads[depth] = h
		return h, nil
	}
}
