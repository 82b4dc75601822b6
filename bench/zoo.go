// Package bench holds apportion's benchmark model zoo and the helpers that
// the side-by-side comparison with PyTorch (bench/compare, bench/torch_side.py)
// shares: the four reference architectures with seeded weights, the
// deterministic benchmark input, and FLOP counts read off the graph.
package bench

import (
	"fmt"
	"math"
	"math/rand/v2"

	"github.com/apportion/apportion/onnxlite"
)

// Spec describes one model of the zoo.
type Spec struct {
	// Name is the model's short name ("mlp-s", …); its file is Name+".onnx".
	Name string
	// Input is the per-sample input shape.
	Input []int
	// Outputs is the number of logits.
	Outputs int
	// Summary is a one-line description of the layers.
	Summary string
	// Seed seeds the weights.
	Seed uint64
}

// Zoo lists the benchmark models in the order the comparison reports them.
var Zoo = []Spec{
	{Name: "mlp-s", Input: []int{30}, Outputs: 2, Summary: "dense 30-64-64-2, ReLU", Seed: 1},
	{Name: "mlp-m", Input: []int{100}, Outputs: 10, Summary: "dense 100-256-256-10, ReLU", Seed: 2},
	{Name: "cnn-s", Input: []int{1, 28, 28}, Outputs: 10, Summary: "1×28×28: conv 8 3×3, ReLU, maxpool 2, conv 16 3×3, ReLU, maxpool 2, fc 10", Seed: 3},
	{Name: "cnn-m", Input: []int{3, 32, 32}, Outputs: 10, Summary: "3×32×32: conv 16, conv 16, maxpool 2, conv 32, conv 32, maxpool 2, fc 10 (3×3, pad 1, ReLU after each conv)", Seed: 4},
}

// MLP12 is the twelve-feature model of the Shapley benchmark, the most
// players the automatic Shapley estimator enumerates exactly. It is not
// in Zoo: the comparison times only Shapley values on it.
var MLP12 = Spec{Name: "mlp-12", Input: []int{12}, Outputs: 3, Summary: "dense 12-64-64-3, ReLU", Seed: 5}

// All is every model of the package, Zoo and MLP12: the files of
// bench/models.
var All = append(append([]Spec(nil), Zoo...), MLP12)

// Lookup returns the Spec called name, one of All.
func Lookup(name string) (Spec, error) {
	for _, s := range All {
		if s.Name == name {
			return s, nil
		}
	}
	return Spec{}, fmt.Errorf("bench: no zoo model %q", name)
}

// builder assembles an ONNX graph with seeded initializers.
type builder struct {
	m   *onnxlite.Model
	rng *rand.Rand
}

func newBuilder(s Spec) *builder {
	b := &builder{
		m: &onnxlite.Model{
			IRVersion:    8,
			Opsets:       []onnxlite.OpsetImport{{Version: 13}},
			ProducerName: "apportion-bench-zoo",
			DocString:    s.Summary,
			Graph:        &onnxlite.Graph{Name: s.Name},
		},
		rng: rand.New(rand.NewPCG(s.Seed, 0x5eed)),
	}
	ty := &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Float, HasShape: true, Shape: []onnxlite.Dim{{Param: "N"}}}
	for _, d := range s.Input {
		ty.Shape = append(ty.Shape, onnxlite.Dim{Value: int64(d), HasValue: true})
	}
	b.m.Graph.Inputs = []*onnxlite.ValueInfo{{Name: "x", Type: ty}}
	b.m.Graph.Outputs = []*onnxlite.ValueInfo{{Name: "logits", Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Float, HasShape: true,
		Shape: []onnxlite.Dim{{Param: "N"}, {Value: int64(s.Outputs), HasValue: true}}}}}
	return b
}

// weights adds a float32 initializer drawn uniformly from ±√(6/fanIn)
// (He et al. 2015, uniform variant of eq. 10: variance 2/fan_in).
func (b *builder) weights(name string, fanIn int, dims ...int64) string {
	n := int64(1)
	for _, d := range dims {
		n *= d
	}
	lim := math.Sqrt(6 / float64(fanIn))
	v := make([]float32, n)
	for i := range v {
		v[i] = float32((2*b.rng.Float64() - 1) * lim)
	}
	b.m.Graph.Initializers = append(b.m.Graph.Initializers, &onnxlite.Tensor{Name: name, DType: onnxlite.Float, Dims: dims, Data: v})
	return name
}

// bias adds a small float32 bias in ±0.05.
func (b *builder) bias(name string, n int64) string {
	v := make([]float32, n)
	for i := range v {
		v[i] = float32((2*b.rng.Float64() - 1) * 0.05)
	}
	b.m.Graph.Initializers = append(b.m.Graph.Initializers, &onnxlite.Tensor{Name: name, DType: onnxlite.Float, Dims: []int64{n}, Data: v})
	return name
}

func (b *builder) node(op, out string, ins []string, attrs ...*onnxlite.Attribute) string {
	b.m.Graph.Nodes = append(b.m.Graph.Nodes, &onnxlite.Node{Name: out, OpType: op, Inputs: ins, Outputs: []string{out}, Attrs: attrs})
	return out
}

func ints(name string, v ...int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInts, Ints: v}
}

func (b *builder) dense(x string, i int, in, out int64, last bool) string {
	name := fmt.Sprintf("fc%d", i)
	y := b.node("Gemm", name, []string{x, b.weights(name+".weight", int(in), out, in), b.bias(name+".bias", out)},
		&onnxlite.Attribute{Name: "transB", Type: onnxlite.AttrInt, I: 1})
	if last {
		return y
	}
	return b.node("Relu", name+".relu", []string{y})
}

func (b *builder) conv(x string, i int, cin, cout int64) string {
	name := fmt.Sprintf("conv%d", i)
	y := b.node("Conv", name, []string{x, b.weights(name+".weight", int(cin*9), cout, cin, 3, 3), b.bias(name+".bias", cout)},
		ints("kernel_shape", 3, 3), ints("pads", 1, 1, 1, 1), ints("strides", 1, 1))
	return b.node("Relu", name+".relu", []string{y})
}

func (b *builder) pool(x string, i int) string {
	return b.node("MaxPool", fmt.Sprintf("pool%d", i), []string{x}, ints("kernel_shape", 2, 2), ints("strides", 2, 2))
}

// Build returns the zoo model s with its seeded weights. The same Spec always
// gives the same bytes under onnxlite.Encode.
func Build(s Spec) (*onnxlite.Model, error) {
	b := newBuilder(s)
	var y string
	switch s.Name {
	case "mlp-s", "mlp-m", "mlp-12":
		w := int64(64)
		if s.Name == "mlp-m" {
			w = 256
		}
		y = b.dense("x", 1, int64(s.Input[0]), w, false)
		y = b.dense(y, 2, w, w, false)
		y = b.dense(y, 3, w, int64(s.Outputs), true)
	case "cnn-s":
		y = b.conv("x", 1, 1, 8)
		y = b.pool(y, 1)
		y = b.conv(y, 2, 8, 16)
		y = b.pool(y, 2)
		y = b.node("Flatten", "flatten", []string{y})
		y = b.dense(y, 1, 16*7*7, int64(s.Outputs), true)
	case "cnn-m":
		y = b.conv("x", 1, 3, 16)
		y = b.conv(y, 2, 16, 16)
		y = b.pool(y, 1)
		y = b.conv(y, 3, 16, 32)
		y = b.conv(y, 4, 32, 32)
		y = b.pool(y, 2)
		y = b.node("Flatten", "flatten", []string{y})
		y = b.dense(y, 1, 32*8*8, int64(s.Outputs), true)
	default:
		return nil, fmt.Errorf("bench: no zoo model %q", s.Name)
	}
	// The last node writes the graph output.
	last := b.m.Graph.Nodes[len(b.m.Graph.Nodes)-1]
	last.Outputs[0] = "logits"
	if err := b.m.Validate(); err != nil {
		return nil, fmt.Errorf("bench: model %s: %w", s.Name, err)
	}
	return b.m, nil
}

// Input returns n samples of per-sample shape s.Input, row-major: element i
// of the batch is 0.5·sin(0.37·i + 0.1). bench/torch_side.py computes the
// same values, so both sides see the same float64 input before rounding to
// float32.
func Input(s Spec, n int) []float64 {
	size := n
	for _, d := range s.Input {
		size *= d
	}
	x := make([]float64, size)
	for i := range x {
		x[i] = 0.5 * math.Sin(0.37*float64(i)+0.1)
	}
	return x
}

// FLOPs returns the floating-point operations of one forward pass of one
// sample: 2 per multiply-accumulate of every Gemm, MatMul and Conv (the bias
// add, activations and pooling are not counted; common practice, as in most
// published model FLOP tables).
func FLOPs(m *onnxlite.Model, input []int) (int64, error) {
	st, err := onnxlite.Infer(m, map[string][]int{m.Graph.Inputs[0].Name: append([]int{1}, input...)})
	if err != nil {
		return 0, fmt.Errorf("bench: flops: %w", err)
	}
	var total int64
	for _, n := range st.Nodes {
		switch n.OpType {
		case "Gemm", "MatMul":
			a := st.Values[n.Inputs[0]].Shape
			y := st.Values[n.Outputs[0]].Shape
			k := a[len(a)-1]
			if n.OpType == "Gemm" && n.AttrInt("transA", 0) != 0 {
				k = a[0]
			}
			total += 2 * int64(k) * st.Values[n.Outputs[0]].NumElements()
			_ = y
		case "Conv":
			w := st.Values[n.Inputs[1]].Shape // (M, C/group, kH, kW)
			macsPerOut := int64(1)
			for _, d := range w[1:] {
				macsPerOut *= int64(d)
			}
			total += 2 * macsPerOut * st.Values[n.Outputs[0]].NumElements()
		}
	}
	return total, nil
}
