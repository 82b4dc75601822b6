package explain_test

import (
	"bytes"
	"context"
	"math"
	"os/exec"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/internal/debpython"
	"github.com/apportion/apportion/onnxlite"
)

// The layers are the Gemm and Conv nodes of the demo models as the ONNX
// project's python package lists them (python3-onnx 1.12: the node names
// of onnx.load(...).graph.node with op_type Gemm or Conv), from the input
// to the output.
func TestLayersOfTheDemos(t *testing.T) {
	py := debpython.Require(t, "onnx")
	for _, name := range []string{"pumps", "welds"} {
		sc, err := demo.Get(name)
		require.NoError(t, err)
		m, err := explain.Decode(sc.Model, name, explain.DecodeOptions{})
		require.NoError(t, err)
		cmd := exec.Command(py, "-c", "import onnx, sys; g = onnx.load(sys.stdin.buffer).graph; print(' '.join(n.name for n in g.node if n.op_type in ('Gemm', 'Conv')))")
		cmd.Stdin = bytes.NewReader(sc.Model)
		out, err := cmd.Output()
		require.NoError(t, err)
		require.Equal(t, strings.Fields(string(out)), m.Layers(), name)
	}
}

// Randomize replaces the weights and biases of the last d layers by
// N(0, rms²) draws and keeps every other initializer bit for bit; the
// model it was made from is untouched, and the same seed gives the same
// bits. The draws' root mean square matches the trained one's within
// five standard errors (the RMS of n normal draws has a relative standard
// error of about 1/√(2n), a closed form of the χ distribution).
func TestRandomize(t *testing.T) {
	sc, err := demo.Get("welds")
	require.NoError(t, err)
	m, err := explain.Decode(sc.Model, "welds", explain.DecodeOptions{})
	require.NoError(t, err)
	before := values(t, m.Graph)
	r, err := m.Randomize(2, 5)
	require.NoError(t, err)
	again, err := m.Randomize(2, 5)
	require.NoError(t, err)
	require.Equal(t, before, values(t, m.Graph), "the model itself changed")
	require.Equal(t, values(t, r.Graph), values(t, again.Graph), "the same seed gave other weights")
	after := values(t, r.Graph)
	for name, v := range before {
		changed := strings.HasPrefix(name, "dense")
		if !changed {
			require.Equal(t, v, after[name], name)
			continue
		}
		require.NotEqual(t, v, after[name], name)
		n := float64(len(v))
		if got, want := rms(after[name]), rms(v); math.Abs(got-want) > 5*want/math.Sqrt(2*n) {
			t.Errorf("%s: rms %v, trained %v", name, got, want)
		}
	}
	// The randomized copy compiles and runs.
	require.NoError(t, r.Compile(explain.CompileOptions{Parallel: 1}))
	h, err := r.Head("", false)
	require.NoError(t, err)
	out, err := h.Forward(context.Background(), make([]float64, 32*32), 1)
	require.NoError(t, err)
	require.Len(t, out, 2)
	_, err = m.Randomize(5, 1)
	require.Error(t, err, "welds has four layers")
}

func values(t *testing.T, g *onnxlite.Model) map[string][]float64 {
	t.Helper()
	out := map[string][]float64{}
	for _, init := range g.Graph.Initializers {
		v, err := init.Float64s()
		require.NoError(t, err)
		out[init.Name] = slices.Clone(v)
	}
	return out
}

func rms(v []float64) float64 {
	s := 0.0
	for _, x := range v {
		s += x * x
	}
	return math.Sqrt(s / float64(len(v)))
}
