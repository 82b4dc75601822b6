package nn

import (
	"strings"

	"context"
	"math"
	"math/rand"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/onnxlite"
)

// The fused Conv/Gemm + Relu ops must give the values of the two ops run one
// after the other, bit for bit (IEEE 754 binary32/binary64 bit patterns
// compared with math.Float64bits: Head widens float32 exactly), forward and
// backward.

// fuseHeads compiles m twice, with the fusion off and on, and returns the
// first output's Head of each. Machines are built on the first run, so each
// network is run once while the flag has its value.
func fuseHeads(t *testing.T, m *onnxlite.Model, dt DType, x []float64, n int) (off, on *Head) {
	t.Helper()
	build := func(disable bool) *Head {
		fuseReluOff = disable
		defer func() { fuseReluOff = false }()
		nw, err := Compile(m, Options{DType: dt, Machines: 1})
		require.NoError(t, err)
		h, err := nw.Head(Selection{})
		require.NoError(t, err)
		_, err = h.Forward(context.Background(), x, n)
		require.NoError(t, err)
		_, _, err = h.Gradient(context.Background(), x, n, make([]int, n))
		require.NoError(t, err)
		return h
	}
	return build(true), build(false)
}

// requireSameBits checks that got and want hold the same bit patterns.
func requireSameBits(t *testing.T, name string, got, want []float64) {
	t.Helper()
	require.Len(t, got, len(want), name)
	for i := range want {
		if math.Float64bits(got[i]) != math.Float64bits(want[i]) {
			// IEEE 754 bit patterns
			t.Fatalf("%s[%d]: fused %v (%#016x), unfused %v (%#016x)", name, i, got[i], math.Float64bits(got[i]), want[i], math.Float64bits(want[i]))
		}
	}
}

// checkFusedSame compares forward outputs and the gradients of every output
// element of sample 0 (and target 0 for the others) between the two heads.
func checkFusedSame(t *testing.T, name string, off, on *Head, x []float64, n int) {
	t.Helper()
	ctx := context.Background()
	yOff, err := off.Forward(ctx, x, n)
	require.NoError(t, err)
	yOn, err := on.Forward(ctx, x, n)
	require.NoError(t, err)
	requireSameBits(t, name+" forward", yOn, yOff)
	for k := 0; k < on.OutputSize(); k++ {
		target := make([]int, n)
		target[0] = k
		_, gOff, err := off.Gradient(ctx, x, n, target)
		require.NoError(t, err)
		_, gOn, err := on.Gradient(ctx, x, n, target)
		require.NoError(t, err)
		requireSameBits(t, name+" gradient", gOn, gOff)
	}
}

// fusedOps builds the gorgonia graph of m for input shape in and counts the
// Conv and Gemm ops that apply a Relu, and the Relu ops left.
func fusedOps(t *testing.T, m *onnxlite.Model, dt tensor.Dtype, in map[string][]int) (fused, relus int) {
	t.Helper()
	st, err := onnxlite.Infer(m, in)
	require.NoError(t, err)
	b := newBuilder(st, dt, m)
	for _, name := range st.Inputs {
		gs := gShape(st.Values[name].Shape)
		b.vals[name] = G.NewTensor(b.g, dt, len(gs), G.WithShape(gs...), G.WithName(name))
	}
	for _, n := range needed(st.Nodes, st.Outputs) {
		require.NoError(t, b.node(n), n.Name)
	}
	for _, n := range b.g.AllNodes() {
		if n.Op() == nil {
			continue
		}
		// The ops describe themselves: a fused Relu as " relu" closing the
		// attributes of a Conv or MatMul, a Relu as "Relu(...)".
		switch s := n.Op().String(); {
		case (strings.HasPrefix(s, "Conv") || strings.HasPrefix(s, "MatMul")) && strings.HasSuffix(s, "relu}"):
			fused++
		case strings.HasPrefix(s, "Relu("):
			relus++
		}
	}
	return fused, relus
}

// specialInput fills x with uniform values in [-1, 1) and makes the first
// sample all −0 and every seventh value −0 (Head refuses NaN inputs; NaN
// enters through a bias, see fuseGraph).
func specialInput(rng *rand.Rand, n, sample int) []float64 {
	x := randomInput(rng, n)
	for i := range x {
		if i < sample || i%7 == 0 {
			x[i] = math.Copysign(0, -1)
		}
	}
	return x
}

func TestFuseReluBenchModelsBitIdentical(t *testing.T) {
	paths, err := filepath.Glob("../bench/models/*.onnx")
	require.NoError(t, err)
	require.Len(t, paths, 5, "bench/models") // the zoo and MLP-12
	rng := rand.New(rand.NewSource(71))
	for _, p := range paths {
		m, err := onnxlite.DecodeFile(p, onnxlite.DecodeOptions{})
		require.NoError(t, err, p)
		for _, dt := range []DType{Float32, Float64} {
			nw, err := Compile(m, Options{DType: dt})
			require.NoError(t, err)
			port := nw.Inputs()[0]
			size := 1
			for _, d := range port.Shape {
				size *= d
			}
			in := map[string][]int{port.Name: append([]int{2}, port.Shape...)}
			fused, relus := fusedOps(t, m, tensor.Float32, in)
			require.Positive(t, fused, "%s: fused ops", p)
			require.Zero(t, relus, "%s: Relu ops left (every Relu of the bench models follows a Conv or Gemm)", p)
			n := 2
			x := specialInput(rng, n*size, size)
			off, on := fuseHeads(t, m, dt, x, n)
			checkFusedSame(t, filepath.Base(p), off, on, x, n)
		}
	}
}

// fuseGraph is x → Conv (or Gemm) → Relu → second op → y, with random sizes,
// or, with direct, x → Conv (or Gemm) → Relu = y. The first op's weights
// are +0 in its first output channel and its bias −0 there, so a sample of
// −0 inputs gives exact sums of −0 (IEEE 754: +0·−0 = −0, −0 + −0 = −0); the
// kernels accumulate from +0 and store +0 there, so −0 at the epilogue is
// checked by TestFuseReluEpilogueNegativeZero. With nan the bias is NaN in
// the last channel, which Relu keeps.
func fuseGraph(rng *rand.Rand, conv bool, seed int64, nan, direct bool) (*onnxlite.Model, int) {
	g := newIR(13, seed)
	defer func() {
		for _, t := range g.m.Graph.Initializers {
			v := t.Data.([]float32)
			switch t.Name {
			case "w":
				clear(v[:len(v)/int(t.Dims[0])])
			case "b":
				v[0] = float32(math.Copysign(0, -1))
				if nan && len(v) > 1 {
					v[len(v)-1] = float32(math.NaN())
				}
			}
		}
		if direct {
			nodes := g.m.Graph.Nodes
			g.m.Graph.Nodes = nodes[:len(nodes)-1]
			nodes[len(nodes)-2].Outputs[0] = "y"
		}
	}()
	if conv {
		c, m, h := 1+rng.Intn(3), 1+rng.Intn(8), 4+rng.Intn(6)
		g.input("x", -1, int64(c), int64(h), int64(h))
		pad := int64(rng.Intn(2))
		a := g.node("Conv", []string{"x", g.random("w", 0.5, int64(m), int64(c), 3, 3), g.random("b", 0.3, int64(m))}, "c", aInts("pads", pad, pad, pad, pad))
		a = g.node("Relu", []string{a}, "r")
		g.node("Conv", []string{a, g.random("w2", 0.5, 2, int64(m), 1, 1)}, "y")
		g.output("y")
		return g.m, c * h * h
	}
	in, h := 1+rng.Intn(20), 1+rng.Intn(40)
	g.input("x", -1, int64(in))
	a := g.node("Gemm", []string{"x", g.random("w", 0.5, int64(h), int64(in)), g.random("b", 0.3, int64(h))}, "h", aInt("transB", 1))
	a = g.node("Relu", []string{a}, "r")
	g.node("Gemm", []string{a, g.random("w2", 0.5, int64(h), 3)}, "y")
	g.output("y")
	return g.m, in
}

// fuseShape is the shape of one sample of the first input of m, batch 1.
func fuseShape(m *onnxlite.Model) []int {
	s := []int{1}
	for _, d := range m.Graph.Inputs[0].Type.Shape[1:] {
		s = append(s, int(d.Value))
	}
	return s
}

func TestFuseReluRandomGraphsBitIdentical(t *testing.T) {
	rng := rand.New(rand.NewSource(72))
	for i := 0; i < 16; i++ {
		conv := i%2 == 0
		m, size := fuseGraph(rng, conv, int64(100+i), i%4 < 2, i%3 == 0)
		fused, relus := fusedOps(t, m, tensor.Float64, map[string][]int{"x": fuseShape(m)})
		require.Equal(t, 1, fused, "graph %d", i)
		require.Zero(t, relus, "graph %d", i)
		for _, dt := range []DType{Float32, Float64} {
			n := 3
			x := specialInput(rng, n*size, size)
			off, on := fuseHeads(t, m, dt, x, n)
			checkFusedSame(t, "random graph", off, on, x, n)
		}
	}
}

func TestFuseReluNotWhenValueHasOtherReaders(t *testing.T) {
	in := map[string][]int{"x": {1, 1, 6, 6}}
	// The Conv output also feeds an Add.
	g := newIR(13, 5)
	g.input("x", -1, 1, 6, 6)
	c := g.node("Conv", []string{"x", g.random("w", 0.5, 2, 1, 3, 3)}, "c")
	r := g.node("Relu", []string{c}, "r")
	g.node("Add", []string{r, c}, "y")
	g.output("y")
	fused, relus := fusedOps(t, g.m, tensor.Float32, in)
	require.Zero(t, fused, "conv read by Relu and Add")
	require.Equal(t, 1, relus)

	// The Conv output is a graph output.
	g = newIR(13, 6)
	g.input("x", -1, 1, 6, 6)
	c = g.node("Conv", []string{"x", g.random("w", 0.5, 2, 1, 3, 3)}, "c")
	g.node("Relu", []string{c}, "y")
	g.output("y")
	g.output("c")
	fused, relus = fusedOps(t, g.m, tensor.Float32, in)
	require.Zero(t, fused, "conv output is a graph output")
	require.Equal(t, 1, relus)

	// A Gemm whose C is a run-time value runs its bias as an Add: the Relu
	// must follow that Add, so nothing is fused.
	g = newIR(13, 7)
	g.input("x", -1, 4)
	c = g.node("Gemm", []string{"x", g.random("w", 0.5, 4, 4), "x"}, "c")
	g.node("Relu", []string{c}, "y")
	g.output("y")
	fused, relus = fusedOps(t, g.m, tensor.Float32, map[string][]int{"x": {1, 4}})
	require.Zero(t, fused, "Gemm with a run-time C")
	require.Equal(t, 1, relus)
}

func TestFuseReluGradcheck(t *testing.T) {
	rng := rand.New(rand.NewSource(73))
	m, size := fuseGraph(rng, true, 201, false, false)
	fused, _ := fusedOps(t, m, tensor.Float64, map[string][]int{"x": fuseShape(m)})
	require.Equal(t, 1, fused)
	nw, err := Compile(m, Options{DType: Float64})
	require.NoError(t, err)
	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	// central finite differences (fdCheck skips coordinates near a kink)
	gradcheckHead(t, "fused conv+relu", h, randomInput(rng, size), 1, nil)
}
