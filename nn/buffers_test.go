package nn

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"context"
	"fmt"
	"math"
	"math/rand"
	"path/filepath"
	"sync"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

// execProgram compiles m and returns the program of a batch of n for the
// first output, with gradients when grad is set.
func execProgram(t testing.TB, m *onnxlite.Model, dt DType, n int, grad bool) (*Network, *program) {
	t.Helper()
	nw, err := Compile(m, Options{DType: dt, Machines: 2})
	require.NoError(t, err)
	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	shapes, _ := h.feed(nil, n)
	p, err := nw.program(shapes, request{outputs: []string{h.value}, grad: grad})
	require.NoError(t, err)
	require.False(t, p.perSample)
	return nw, p
}

// execDraw returns a random input of n samples and, for gradients, a
// random one-hot selection mask.
func execDraw(rng *rand.Rand, p *program, grad bool) (x []float64, mask []float64) {
	x = randomInput(rng, prod(p.inShapes[0]))
	// Some runs scale the input up so that other units are active and
	// buffers see other values than in the run before.
	if rng.Intn(2) == 0 {
		for i := range x {
			x[i] *= 4
		}
	}
	if grad {
		n, per := p.outShapes[0][0], prod(p.outShapes[0][1:])
		mask = make([]float64, n*per)
		for i := 0; i < n; i++ {
			mask[i*per+rng.Intn(per)] = 1
		}
	}
	return x, mask
}

func execRequireBits(t *testing.T, what string, got, want []float64) {
	t.Helper()
	require.Len(t, got, len(want), what)
	for i := range want {
		if math.Float64bits(got[i]) != math.Float64bits(want[i]) {
			require.Failf(t, "not bit-identical", "%s[%d] = %v (%#x), want %v (%#x)", what, i, got[i], math.Float64bits(got[i]), want[i], math.Float64bits(want[i]))
		}
	}
}

// TestExecReuseMatchesFreshMachine runs 50 different inputs one after the
// other on one machine and compares every result bit for bit with the
// result of a newly built machine that keeps no buffers: every op allocates
// its output, zeroed, as the engine did before buffers were kept (the
// reference; keeping buffers must not change a bit, common practice for
// buffer pools). A kernel that reads a buffer before writing it, or leaves
// part of it unwritten, sees values of an earlier step or run there and
// fails the comparison.
func TestExecReuseMatchesFreshMachine(t *testing.T) {
	models := []struct {
		name  string
		model func() *onnxlite.Model
		n     int
	}{
		{"mlp", func() *onnxlite.Model { return mlpModel(30, 64, 2, 41) }, 3},
		{"cnn", func() *onnxlite.Model { return cnnModel(42) }, 2},
		{"misc", execMiscModel, 3},
	}
	runs := 50
	if testing.Short() {
		runs = 10
	}
	for _, md := range models {
		for _, dt := range []DType{Float32, Float64} {
			for _, grad := range []bool{false, true} {
				t.Run(fmt.Sprintf("%s/%v/grad=%v", md.name, dt, grad), func(t *testing.T) {
					_, p := execProgram(t, md.model(), dt, md.n, grad)
					reused, err := p.build()
					require.NoError(t, err)
					require.Positive(t, reused.kept, "the machine keeps output buffers")
					rng := rand.New(rand.NewSource(int64(len(md.name)) + int64(dt)))
					for r := 0; r < runs; r++ {
						x, mask := execDraw(rng, p, grad)
						outs, g, err := reused.run(p, [][]float64{x}, mask)
						require.NoError(t, err)
						fresh, err := p.build()
						require.NoError(t, err)
						clear(fresh.pd) // every step allocates
						wantOuts, wantG, err := fresh.run(p, [][]float64{x}, mask)
						require.NoError(t, err)
						execRequireBits(t, fmt.Sprintf("run %d output", r), outs[0], wantOuts[0])
						if grad {
							execRequireBits(t, fmt.Sprintf("run %d gradient", r), g, wantG)
						}
					}
				})
			}
		}
	}
}

// TestExecConcurrentCallers has 8 goroutines share 2 machines of one
// program; each must get the results a lone caller gets for its own input
// (the sequential results are the reference). Run with -race.
func TestExecConcurrentCallers(t *testing.T) {
	for _, md := range []struct {
		name  string
		model *onnxlite.Model
	}{
		{"mlp", mlpModel(30, 64, 2, 41)},
		{"cnn", cnnModel(42)},
	} {
		t.Run(md.name, func(t *testing.T) {
			nw, err := Compile(md.model, Options{Machines: 2})
			require.NoError(t, err)
			h, err := nw.Head(Selection{})
			require.NoError(t, err)
			const callers, n = 8, 2
			ctx := context.Background()
			xs := make([][]float64, callers)
			targets := make([][]int, callers)
			wantOut := make([][]float64, callers)
			wantGrad := make([][]float64, callers)
			rng := rand.New(rand.NewSource(7))
			for c := range xs {
				xs[c] = randomInput(rng, n*prod(h.InputShape()))
				targets[c] = []int{rng.Intn(h.OutputSize()), rng.Intn(h.OutputSize())}
				wantOut[c], wantGrad[c], err = h.Gradient(ctx, xs[c], n, targets[c])
				require.NoError(t, err)
			}
			var wg sync.WaitGroup
			errs := make([]error, callers)
			for c := 0; c < callers; c++ {
				wg.Add(1)
				go func(c int) {
					defer wg.Done()
					for r := 0; r < 10; r++ {
						o, g, err := h.Gradient(ctx, xs[c], n, targets[c])
						if err != nil {
							errs[c] = err
							return
						}
						for i := range o {
							if math.Float64bits(o[i]) != math.Float64bits(wantOut[c][i]) {
								errs[c] = fmt.Errorf("caller %d run %d: output[%d] = %v, want %v", c, r, i, o[i], wantOut[c][i])
								return
							}
						}
						for i := range g {
							if math.Float64bits(g[i]) != math.Float64bits(wantGrad[c][i]) {
								errs[c] = fmt.Errorf("caller %d run %d: gradient[%d] = %v, want %v", c, r, i, g[i], wantGrad[c][i])
								return
							}
						}
					}
				}(c)
			}
			wg.Wait()
			for _, err := range errs {
				require.NoError(t, err)
			}
		})
	}
}

// execMiscModel runs the other kernels that keep buffers: Pad, Clip,
// Sigmoid, a broadcast Mul, ReduceSum and Softmax, on x of shape N×2×6×6.
func execMiscModel() *onnxlite.Model {
	g := newIR(13, 11)
	g.input("x", -1, 2, 6, 6)
	a := g.node("Pad", []string{"x", g.ints("pads", 0, 0, 1, 1, 0, 0, 1, 1), g.floats("pv", nil, []float32{0.5})}, "pad")
	a = g.node("Clip", []string{a, g.floats("lo", nil, []float32{-0.5}), g.floats("hi", nil, []float32{0.7})}, "clip")
	a = g.node("Sigmoid", []string{a}, "sig")
	a = g.node("Mul", []string{a, g.random("scale", 2, 2, 1, 1)}, "mul")
	a = g.node("Add", []string{a, "pad"}, "add")
	a = g.node("ReduceSum", []string{a, g.ints("axes", 3)}, "sum", aInt("keepdims", 0))
	g.node("Softmax", []string{a}, "y")
	g.output("y")
	return g.m
}

// execBenchModel decodes one of the models that bench/compare times.
func execBenchModel(t testing.TB, name string) *onnxlite.Model {
	t.Helper()
	m, err := onnxlite.DecodeFile(filepath.Join("..", "bench", "models", name+".onnx"), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	return m
}

// TestExecWarmGradientAllocs counts the allocations of a warm
// Head.Gradient on the bench models (testing.AllocsPerRun). The bounds are
// the counts measured with output buffers kept by the machine, plus a
// small margin; before, a machine allocated every op's output on
// every pass (BenchmarkZoo: 308 allocations per mlp-s gradient, 528 per
// cnn-m gradient, 724 and 59 MB per cnn-m integrated-gradients call).
func TestExecWarmGradientAllocs(t *testing.T) {
	if testing.Short() {
		t.Skip("decodes and compiles the bench models")
	}
	if raceEnabled {
		t.Skip("the race detector allocates on its own")
	}
	if !f32.Asm() {
		t.Skip("the counts are those of the packed GEMM; gonum's, which runs without the assembly kernels, allocates on its own")
	}
	ctx := context.Background()
	for _, c := range []struct {
		model string
		n     int
		max   float64 // measured count in the comment
	}{
		{"mlp-s", 1, 8},   // measured 7
		{"mlp-m", 64, 9},  // measured 8
		{"cnn-s", 1, 23},  // measured 20
		{"cnn-m", 64, 23}, // measured 20
	} {
		t.Run(fmt.Sprintf("%s/batch=%d", c.model, c.n), func(t *testing.T) {
			nw, err := Compile(execBenchModel(t, c.model), Options{Machines: 1})
			require.NoError(t, err)
			h, err := nw.Head(Selection{})
			require.NoError(t, err)
			x := randomInput(rand.New(rand.NewSource(3)), c.n*prod(h.InputShape()))
			target := make([]int, c.n)
			for i := range target {
				target[i] = i % h.OutputSize()
			}
			_, _, err = h.Gradient(ctx, x, c.n, target)
			require.NoError(t, err)
			allocs := testing.AllocsPerRun(3, func() {
				if _, _, err := h.Gradient(ctx, x, c.n, target); err != nil {
					t.Fatal(err)
				}
			})
			t.Logf("%s batch %d: %.0f allocations per warm gradient", c.model, c.n, allocs)
			require.LessOrEqual(t, allocs, c.max)
		})
	}
}

// TestExecBuffersShareByLiveness checks on cnn-m at batch 64 that steps
// share backing arrays: the bytes a machine keeps are fewer than one array
// per step would take, and at least the largest step's output (both bounds
// follow from the definition of an interval assignment, common practice).
func TestExecBuffersShareByLiveness(t *testing.T) {
	if testing.Short() {
		t.Skip("decodes and compiles a bench model")
	}
	for _, grad := range []bool{false, true} {
		_, p := execProgram(t, execBenchModel(t, "cnn-m"), Float32, 64, grad)
		m, err := p.build()
		require.NoError(t, err)
		total, largest := 0, 0
		for _, v := range m.pre {
			if v != nil {
				n := 4 * v.Shape().TotalSize()
				total += n
				largest = max(largest, n)
			}
		}
		t.Logf("cnn-m batch 64 grad=%v: %d steps, keeps %d bytes of output buffers (%d without sharing), inputs %d bytes",
			grad, len(m.plan), m.kept, total, execBoundBytes(m))
		require.Less(t, m.kept, total)
		require.GreaterOrEqual(t, m.kept, largest)
	}
}

func execBoundBytes(m *machine) int {
	n := 0
	for _, b := range m.bound {
		n += 4 * b.Shape().TotalSize()
	}
	return n
}
