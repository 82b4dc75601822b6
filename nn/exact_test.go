package nn

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"math"
	"math/rand"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"

	"codeberg.org/sbinet/npyio/npz"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

// The fixtures in testdata/exactig were written by generate.py there with
// float64 torch (Debian python3-torch 1.13.1): an independent
// implementation of Sotoudeh & Thakur's ExactLine over the same ONNX
// files (the path's pieces and, from the input gradient at each piece's
// midpoint, the exact integral and integrated gradients), and the
// activation pattern of a scan of 10^5 evenly spaced points of each path.

const exactDir = "../testdata/exactig"

type exactCase struct {
	Name   string `json:"name"`
	Model  string `json:"model"`
	Logits bool   `json:"logits"`
	Target int    `json:"target"`
	Pieces int    `json:"pieces"`
}

func exactCases(t *testing.T) []exactCase {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(exactDir, "manifest.json"))
	require.NoError(t, err)
	var m struct {
		Cases []exactCase `json:"cases"`
	}
	require.NoError(t, json.Unmarshal(b, &m))
	require.GreaterOrEqual(t, len(m.Cases), 17)
	return m.Cases
}

type exactFixture struct {
	x, base, ig, breaks []float64
	scan                []int
	target, pieces      int
}

func readExact(t *testing.T, name string) exactFixture {
	t.Helper()
	r, err := npz.Open(filepath.Join(exactDir, name+".npz"))
	require.NoError(t, err)
	defer r.Close()
	var f exactFixture
	var target, pieces int64
	var scan []int32
	for _, v := range []struct {
		key string
		dst any
	}{{"x", &f.x}, {"baseline", &f.base}, {"ig", &f.ig}, {"breaks", &f.breaks}, {"scan_changes", &scan}, {"target", &target}, {"pieces", &pieces}} {
		require.NoError(t, r.Read(v.key+".npy", v.dst), v.key)
	}
	f.target, f.pieces = int(target), int(pieces)
	for _, c := range scan {
		f.scan = append(f.scan, int(c))
	}
	return f
}

func exactHead(t *testing.T, model string, logits bool, dt DType) *Head {
	t.Helper()
	m, err := onnxlite.DecodeFile(filepath.Join("..", model), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	nw, err := Compile(m, Options{DType: dt})
	require.NoError(t, err)
	h, err := nw.Head(Selection{Logits: logits})
	require.NoError(t, err)
	require.NoError(t, h.PiecewiseLinear())
	return h
}

// exactModels lists the model files a case checks: the digits CNN's two
// other exports (Reshape through shape arithmetic, a fixed batch of one)
// have the same weights and so the same fixture.
func exactModels(c exactCase) []string {
	if filepath.Base(c.Model) == "digits_cnn.onnx" {
		dir := filepath.Dir(c.Model)
		return []string{c.Model, filepath.Join(dir, "digits_cnn_view.onnx"), filepath.Join(dir, "digits_cnn_batch1.onnx")}
	}
	return []string{c.Model}
}

// exactLong runs the longest cases of TestExactPathReference too: the
// 3×32×32 CNN (about 28 000 pieces from the zero baseline) in float64.
var exactLong = flag.Bool("exact.long", false, "check the exact path integral of every case in float64, the 3×32×32 CNN included")

// TestExactPathReference checks the exact integral on the four zoo models,
// both demos and the reference models against float64 torch's ExactLine
// (testdata/exactig, python3-torch 1.13.1): integrated gradients to 1e-6
// relative L1 in float64 and 1e-4 in float32, the same piece count in
// float64 (within 1% in float32), and completeness, Σ IG = F(x) − F(x′)
// (Sundararajan et al. 2017, Proposition 1), to 1e-9 relative in float64,
// with F from the engine. The 3×32×32 CNN runs in float32 only, unless
// -exact.long is given (go test ./nn -run ExactPathReference -args
// -exact.long).
//
// It also checks the pieces' ends (float64) against a brute-force scan:
// torch's activation pattern (every Relu input's sign, every max-pool
// window's first maximum) at 10^5 evenly spaced points α_i = i/(10^5 − 1)
// of each path. Every cell [α_i, α_i+1] across which the pattern changes
// holds a reported end, and every reported end lies in such a cell. The
// first and last cells are left out: at α = 0 and α = 1 themselves max-pool
// windows may tie (every window of the zero baseline's constant image;
// windows of equal pixels of a sample), so the pattern there is not that
// of the piece that ends there.
func TestExactPathReference(t *testing.T) {
	if testing.Short() {
		t.Skip("integrates ~40 paths of up to 30 000 pieces")
	}
	ctx := context.Background()
	for _, c := range exactCases(t) {
		f := readExact(t, c.Name)
		for _, model := range exactModels(c) {
			for _, dt := range []DType{Float64, Float32} {
				if dt == Float64 && strings.HasPrefix(c.Name, "cnn-m") && !*exactLong {
					t.Logf("%s %v: skipped without -exact.long", c.Name, dt)
					continue
				}
				h := exactHead(t, model, c.Logits, dt)
				scan := dt == Float64 && model == c.Model
				integral, pieces, breaks, err := h.integratePath(ctx, f.base, f.x, f.target, 0, scan)
				require.NoError(t, err, "%s %s %v", c.Name, model, dt)
				ig := make([]float64, len(integral))
				sum := 0.0
				for i, g := range integral {
					ig[i] = (f.x[i] - f.base[i]) * g
					sum += ig[i]
				}
				out, err := h.Forward(ctx, append(append([]float64(nil), f.x...), f.base...), 2)
				require.NoError(t, err)
				k := h.OutputSize()
				delta := out[f.target] - out[k+f.target]
				gap := math.Abs(sum-delta) / math.Max(math.Abs(delta), 1e-6)
				l1 := relativeL1(ig, f.ig)
				if dt == Float64 {
					assert.LessOrEqual(t, l1, 1e-6, "%s %s: IG vs torch ExactLine", c.Name, model)
					assert.LessOrEqual(t, gap, 1e-9, "%s %s: completeness", c.Name, model)
					assert.Equal(t, f.pieces, pieces, "%s %s: pieces vs torch ExactLine", c.Name, model)
				} else {
					assert.LessOrEqual(t, l1, 1e-4, "%s %s float32: IG vs torch ExactLine", c.Name, model)
					assert.InDelta(t, f.pieces, pieces, 0.01*float64(f.pieces)+1, "%s %s float32: pieces", c.Name, model)
				}
				t.Logf("%-20s %-24s %v: %6d pieces, relative L1 %.1e, completeness gap %.1e", c.Name, filepath.Base(model), dt, pieces, l1, gap)
				if scan {
					checkScan(t, c.Name, f.scan, breaks, pieces)
				}
			}
		}
	}
}

// checkScan compares the ends of a path's pieces with the cells of the
// scan across which the activation pattern changes.
func checkScan(t *testing.T, name string, scan []int, breaks []float64, pieces int) {
	t.Helper()
	const n = 100000
	require.Len(t, breaks, pieces-1)
	require.True(t, sort.Float64sAreSorted(breaks))
	changed := map[int]bool{}
	for _, cell := range scan {
		changed[cell] = true
	}
	holds := map[int]int{}
	stray := 0
	for _, b := range breaks {
		cell := min(int(b*(n-1)), n-2)
		// A break within rounding of a scan point counts for both cells.
		for _, cl := range []int{cell, cell - 1, cell + 1} {
			if cl >= 0 && math.Abs(b*(n-1)-float64(cl)) <= 1+1e-9 && changed[cl] {
				holds[cl]++
			}
		}
		if !changed[cell] && cell > 0 && cell < n-2 {
			stray++
		}
	}
	missed := 0
	for cell := range changed {
		if cell > 0 && cell < n-2 && holds[cell] == 0 {
			missed++
		}
	}
	assert.Zero(t, missed, "%s: pattern changes with no reported end in their cell", name)
	assert.Zero(t, stray, "%s: reported ends in cells where the pattern does not change", name)
}

// TestExactPathLinearOperators integrates along a path through every
// operator of the evaluator, on a graph of two branches that meet, and
// checks two closed forms: completeness (the fundamental theorem of
// calculus for path integrals; Sundararajan et al. 2017, Proposition 1),
// with F from the engine, and that the input gradient is constant on
// each piece (Sotoudeh & Thakur 2019, §2), with gradients from the engine
// at points near both ends of every piece: the integral must equal
// Σ_j (α_{j+1} − α_j) ∇F(midpoint_j) with those gradients.
func TestExactPathLinearOperators(t *testing.T) {
	g := newIR(13, 7)
	g.input("x", -1, 2, 6, 6)
	a := g.node("Conv", []string{"x", g.random("cw", 0.5, 3, 2, 3, 3), g.random("cb", 0.2, 3)}, "c", aInts("pads", 1, 1, 1, 1))
	a = g.node("BatchNormalization", []string{a, g.random("s", 1, 3), g.random("t", 0.2, 3), g.random("mu", 0.2, 3), g.floats("var", []int64{3}, []float32{0.5, 1, 2})}, "bn")
	a = g.node("LeakyRelu", []string{a}, "lr", aFloat("alpha", 0.1))
	a = g.node("Pad", []string{a, g.ints("pads", 0, 0, 1, 0, 0, 0, 0, 1)}, "pad", aString("mode", "reflect"))
	a = g.node("AveragePool", []string{a}, "ap", aInts("kernel_shape", 2, 2), aInts("strides", 2, 2), aInts("pads", 1, 1, 1, 1), aInt("count_include_pad", 1))
	b := g.node("MaxPool", []string{"x"}, "mp", aInts("kernel_shape", 2, 2), aInts("strides", 2, 2), aInts("pads", 1, 1, 1, 1))
	b = g.node("Transpose", []string{b}, "tr", aInts("perm", 0, 1, 3, 2))
	b = g.node("Clip", []string{b, g.floats("lo", nil, []float32{-0.3}), g.floats("hi", nil, []float32{0.4})}, "clip")
	b = g.node("PRelu", []string{b, g.random("slope", 0.5, 2, 1, 1)}, "pr")
	a = g.node("Concat", []string{a, b, b}, "cat", aInt("axis", 1))
	a = g.node("Abs", []string{g.node("Sub", []string{g.random("c0", 0.3, 7, 1, 1), a}, "sub")}, "abs")
	r := g.node("ReduceMean", []string{a}, "rm", aInts("axes", 2, 3), aInt("keepdims", 0))
	s := g.node("ReduceSum", []string{g.node("GlobalMaxPool", []string{a}, "gmp"), g.ints("axes", 2, 3)}, "rs", aInt("keepdims", 0))
	a = g.node("Add", []string{r, g.node("Neg", []string{g.node("Div", []string{s, g.floats("two", nil, []float32{2})}, "div")}, "neg")}, "sum")
	a = g.node("MatMul", []string{a, g.random("mw", 1, 7, 4)}, "mm")
	a = g.node("Relu", []string{a}, "r")
	g.node("Gemm", []string{a, g.random("gw", 1, 3, 4), g.random("gb", 0.2, 3)}, "y", aInt("transB", 1))
	g.output("y")
	nw, err := Compile(g.m, Options{DType: Float64})
	require.NoError(t, err)
	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	require.NoError(t, h.PiecewiseLinear())
	rng := rand.New(rand.NewSource(3))
	ctx := context.Background()
	for trial := 0; trial < 4; trial++ {
		x, x0 := randomInput(rng, 72), randomInput(rng, 72)
		for i := range x {
			x[i] *= 3
		}
		target := trial % 3
		integral, pieces, breaks, err := h.integratePath(ctx, x0, x, target, 0, true)
		require.NoError(t, err)
		require.Greater(t, pieces, 3, "the path crosses kinks")
		out, err := h.Forward(ctx, append(append([]float64(nil), x...), x0...), 2)
		require.NoError(t, err)
		sum := 0.0
		for i, gi := range integral {
			sum += (x[i] - x0[i]) * gi
		}
		delta := out[target] - out[3+target]
		assert.InDelta(t, delta, sum, 1e-10*math.Max(1, math.Abs(delta)), "completeness, trial %d", trial)

		ends := append(append([]float64{0}, breaks...), 1)
		var pts []float64
		for j := 0; j+1 < len(ends); j++ {
			a, b := ends[j], ends[j+1]
			if b-a < 1e-9 {
				continue
			}
			w := (b - a) * 1e-3
			for _, u := range []float64{a + w, (a + b) / 2, b - w} {
				for i := range x {
					pts = append(pts, x0[i]+u*(x[i]-x0[i]))
				}
			}
		}
		m := len(pts) / 72
		targets := make([]int, m)
		for i := range targets {
			targets[i] = target
		}
		_, grads, err := h.Gradient(ctx, pts, m, targets)
		require.NoError(t, err)
		want := make([]float64, 72)
		piece := 0
		for j := 0; j+1 < len(ends); j++ {
			a, b := ends[j], ends[j+1]
			if b-a < 1e-9 {
				continue
			}
			near0, mid, near1 := grads[(3*piece)*72:(3*piece+1)*72], grads[(3*piece+1)*72:(3*piece+2)*72], grads[(3*piece+2)*72:(3*piece+3)*72]
			assert.InDeltaSlice(t, mid, near0, 1e-9, "trial %d piece %d [%g, %g]: gradient near the start", trial, j, a, b)
			assert.InDeltaSlice(t, mid, near1, 1e-9, "trial %d piece %d [%g, %g]: gradient near the end", trial, j, a, b)
			for i := range want {
				want[i] += (b - a) * mid[i]
			}
			piece++
		}
		assert.InDeltaSlice(t, want, integral, 1e-8, "trial %d: Σ widths × midpoint gradients", trial)
	}
}

// TestExactPathRefuses checks that a network with an operator that is not
// piecewise-linear, or a piecewise-linear operator used in a way that is
// not, is refused, naming the operator and the node.
func TestExactPathRefuses(t *testing.T) {
	for _, c := range []struct {
		name  string
		build func(g *irGraph) string
		want  string
	}{
		{"tanh", func(g *irGraph) string {
			return g.node("Tanh", []string{"x"}, "squash")
		}, `operator Tanh (node "squash") is not known to be piecewise-linear`},
		{"product", func(g *irGraph) string {
			return g.node("Mul", []string{"x", g.node("Relu", []string{"x"}, "r")}, "sq")
		}, `operator Mul (node "sq") of two run-time values is not piecewise-linear`},
		{"inner softmax", func(g *irGraph) string {
			return g.node("Relu", []string{g.node("Softmax", []string{"x"}, "sm", aInt("axis", 1))}, "r")
		}, `operator Softmax (node "sm") is not known to be piecewise-linear`},
		{"division", func(g *irGraph) string {
			return g.node("Div", []string{g.floats("one", nil, []float32{1}), "x"}, "inv")
		}, `operator Div (node "inv") divides by a run-time value`},
	} {
		g := newIR(13, 1)
		g.input("x", -1, 4)
		g.node("Identity", []string{c.build(g)}, "y")
		g.output("y")
		nw, err := Compile(g.m, Options{DType: Float64})
		require.NoError(t, err, c.name)
		h, err := nw.Head(Selection{})
		require.NoError(t, err, c.name)
		err = h.PiecewiseLinear()
		require.ErrorIs(t, err, ErrNotPiecewiseLinear, c.name)
		assert.Contains(t, err.Error(), c.want, c.name)
		_, _, err = h.IntegratePath(context.Background(), make([]float64, 4), []float64{1, 2, 3, 4}, 0, 0)
		assert.ErrorIs(t, err, ErrNotPiecewiseLinear, c.name)
	}
}

// TestExactPathPieceLimit checks the limit: a path of more pieces than
// maxPieces returns no integral and a count above the limit.
func TestExactPathPieceLimit(t *testing.T) {
	h, err := mustHead(mlpModel(6, 32, 3, 5), Float64)
	require.NoError(t, err)
	rng := rand.New(rand.NewSource(9))
	x, x0 := randomInput(rng, 6), randomInput(rng, 6)
	full, pieces, err := h.IntegratePath(context.Background(), x0, x, 1, 0)
	require.NoError(t, err)
	require.NotNil(t, full)
	require.Greater(t, pieces, 4)
	got, over, err := h.IntegratePath(context.Background(), x0, x, 1, pieces-1)
	require.NoError(t, err)
	assert.Nil(t, got)
	assert.Greater(t, over, pieces-1)
	got, same, err := h.IntegratePath(context.Background(), x0, x, 1, pieces)
	require.NoError(t, err)
	assert.Equal(t, full, got, "at the limit the integral is returned")
	assert.Equal(t, pieces, same)
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	_, _, err = h.IntegratePath(ctx, x0, x, 1, 0)
	assert.True(t, errors.Is(err, context.Canceled), "%v", err)

	// Over the limit the count is a lower bound on the path's pieces, found
	// at the first layer whose crossings show it: for every limit below
	// the path's count, a count above the limit and at most the path's.
	for limit := 1; limit < pieces; limit++ {
		got, over, err := h.IntegratePath(context.Background(), x0, x, 1, limit)
		require.NoError(t, err)
		assert.Nil(t, got)
		assert.Greater(t, over, limit)
		assert.LessOrEqual(t, over, pieces)
	}
}

func TestExactPathStopsAtFirstLayer(t *testing.T) {
	// The benchmark's CNN-S (conv 8, ReLU, pool, conv 16, ReLU, pool, fc):
	// along the path from 0 to its first benchmark input, thousands of its
	// first ReLU's 6272 units cross zero (their inputs are affine in α,
	// Sotoudeh & Thakur 2019), so a limit of 1024 is over at the first
	// level; the count reported is a lower bound on the pieces the whole
	// integration finds.
	b, err := os.ReadFile(filepath.Join("..", "bench", "models", "cnn-s.onnx"))
	require.NoError(t, err)
	m, err := onnxlite.Decode(bytes.NewReader(b), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	h, err := mustHead(m, Float32)
	require.NoError(t, err)
	x := make([]float64, 784)
	for i := range x {
		x[i] = 0.5 * math.Sin(0.37*float64(i)+0.1)
	}
	zero := make([]float64, 784)
	got, bound, err := h.IntegratePath(context.Background(), zero, x, 3, 1024)
	require.NoError(t, err)
	assert.Nil(t, got)
	assert.Greater(t, bound, 1024)
	_, pieces, err := h.IntegratePath(context.Background(), zero, x, 3, 0)
	require.NoError(t, err)
	assert.LessOrEqual(t, bound, pieces)
	t.Logf("first-level bound %d, pieces %d", bound, pieces)
}

func mustHead(m *onnxlite.Model, dt DType) (*Head, error) {
	nw, err := Compile(m, Options{DType: dt})
	if err != nil {
		return nil, err
	}
	return nw.Head(Selection{})
}

func relativeL1(a, b []float64) float64 {
	var d, n float64
	for i := range a {
		d += math.Abs(a[i] - b[i])
		n += math.Abs(b[i])
	}
	return d / math.Max(n, 1e-300)
}
