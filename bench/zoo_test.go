package bench

import (
	"bytes"
	"context"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strings"
	"testing"

	"github.com/apportion/apportion/internal/debpython"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/onnxlite"
)

// convMACs is the multiply-accumulate count of a convolution producing
// cout×oh×ow outputs from cin channels with a k×k kernel: every output
// element is a dot product of length cin·k·k (common practice).
func convMACs(cout, oh, ow, cin, k int64) int64 { return cout * oh * ow * cin * k * k }

func TestFLOPsClosedForm(t *testing.T) {
	// Closed forms: 2 FLOPs per multiply-accumulate (common practice); a
	// dense layer in→out has in·out MACs, a convolution convMACs; with 3×3
	// kernels and pad 1 a convolution keeps the spatial size and a 2×2
	// max-pool of stride 2 halves it (ONNX operator spec, Conv and MaxPool
	// output-shape formulas).
	want := map[string]int64{
		"mlp-s": 2 * (30*64 + 64*64 + 64*2),
		"mlp-m": 2 * (100*256 + 256*256 + 256*10),
		"cnn-s": 2 * (convMACs(8, 28, 28, 1, 3) + convMACs(16, 14, 14, 8, 3) + 16*7*7*10),
		"cnn-m": 2 * (convMACs(16, 32, 32, 3, 3) + convMACs(16, 32, 32, 16, 3) +
			convMACs(32, 16, 16, 16, 3) + convMACs(32, 16, 16, 32, 3) + 32*8*8*10),
		"mlp-12": 2 * (12*64 + 64*64 + 64*3),
	}
	for _, s := range All {
		m, err := Build(s)
		require.NoError(t, err, s.Name)
		got, err := FLOPs(m, s.Input)
		require.NoError(t, err, s.Name)
		assert.Equal(t, want[s.Name], got, s.Name)
	}
}

func TestInputFormula(t *testing.T) {
	s, err := Lookup("cnn-s")
	require.NoError(t, err)
	x := Input(s, 2)
	require.Len(t, x, 2*28*28)
	// bench/torch_side.py computes 0.5·sin(0.37·i + 0.1) with numpy; the
	// values here are that closed form evaluated by math.Sin.
	for _, i := range []int{0, 1, 783, 1567} {
		assert.Equal(t, 0.5*math.Sin(0.37*float64(i)+0.1), x[i], "i=%d", i)
	}
	_, err = Lookup("resnet-152")
	assert.Error(t, err)
}

// TestZooFilesUpToDate checks that the committed bench/models files are
// the bytes Build and onnxlite.Encode give today (the weights are seeded;
// the files are what the PyTorch side loads).
func TestZooFilesUpToDate(t *testing.T) {
	for _, s := range All {
		m, err := Build(s)
		require.NoError(t, err)
		var a, b bytes.Buffer
		require.NoError(t, onnxlite.Encode(&a, m))
		m2, err := Build(s)
		require.NoError(t, err)
		require.NoError(t, onnxlite.Encode(&b, m2))
		require.Equal(t, a.Bytes(), b.Bytes(), "%s: Build is not deterministic", s.Name)
		file, err := os.ReadFile(filepath.Join("models", s.Name+".onnx"))
		require.NoError(t, err, "run go run ./bench/zoo")
		assert.Equal(t, a.Bytes(), file, "%s: bench/models is stale; run go run ./bench/zoo", s.Name)
	}
}

// TestZooPassesONNXChecker runs the reference ONNX checker (python3-onnx
// 1.12, onnx.checker.check_model with full_check, which also runs ONNX's
// own shape inference) on every zoo model.
func TestZooPassesONNXChecker(t *testing.T) {
	python := debpython.Require(t, "onnx")
	args := []string{"-c", "import onnx, sys\n" +
		"for p in sys.argv[1:]:\n" +
		"    m = onnx.load(p); onnx.checker.check_model(m, full_check=True)\n" +
		"    print(onnx.shape_inference.infer_shapes(m).graph.output[0].type.tensor_type.shape.dim[1].dim_value)\n"}
	for _, s := range Zoo {
		path, err := filepath.Abs(filepath.Join("models", s.Name+".onnx"))
		require.NoError(t, err)
		args = append(args, path)
	}
	out, err := exec.Command(python, args...).CombinedOutput()
	require.NoError(t, err, "%s", out)
	widths := strings.Fields(string(out))
	require.Len(t, widths, len(Zoo), "%s", out)
	for i, s := range Zoo {
		// ONNX shape inference gives the logits width.
		assert.Equal(t, itoa(s.Outputs), widths[i], s.Name)
	}
}

func itoa(n int) string {
	b, _ := json.Marshal(n)
	return string(b)
}

// TestAgreesWithTorch compares apportion's outputs, input gradients and
// 64-point integrated gradients with PyTorch's (torch.nn modules rebuilt from
// the same ONNX file by torch_side.py, gradients by torch.autograd) to 1e-5.
func TestAgreesWithTorch(t *testing.T) {
	python := debpython.Require(t, "onnx", "torch")
	if testing.Short() {
		t.Skip("starts PyTorch")
	}
	var in bytes.Buffer
	for _, s := range Zoo {
		json.NewEncoder(&in).Encode(map[string]any{"cmd": "check", "model": s.Name, "n": 2})
	}
	cmd := exec.Command(python, "torch_side.py", "--threads", "1")
	cmd.Stdin = &in
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	out, err := cmd.Output()
	require.NoError(t, err, stderr.String())
	dec := json.NewDecoder(bytes.NewReader(out))
	ctx := context.Background()
	for _, s := range Zoo {
		var ref struct {
			Out, Grad, IG []float64
			Target        int
			Error         string
		}
		require.NoError(t, dec.Decode(&ref), s.Name)
		require.Empty(t, ref.Error, s.Name)
		h := zooHead(t, s)
		x := Input(s, 2)
		out, err := h.Forward(ctx, x, 2)
		require.NoError(t, err)
		target := gradattr.Top(out[:s.Outputs])
		require.Equal(t, ref.Target, target, s.Name)
		_, grad, err := h.Gradient(ctx, x, 2, []int{target, target})
		require.NoError(t, err)
		x1 := x[:len(x)/2]
		base := make([]float64, len(x1))
		for i, v := range x1 {
			base[i] = 0.1 * v // the baseline torch_side.py's check uses
		}
		ig, err := gradattr.IntegratedGradients(ctx, h, x1, target, gradattr.IGOptions{Points: 64,
			Baselines: []gradattr.Baseline{{Kind: gradattr.BaselineValues, Values: base}}})
		require.NoError(t, err)
		for _, c := range []struct {
			name      string
			got, want []float64
		}{{"outputs", out, ref.Out}, {"gradients", grad, ref.Grad}, {"IG-64", ig.Attributions, ref.IG}} {
			require.Len(t, c.got, len(c.want), "%s %s", s.Name, c.name)
			scale := 1.0
			for _, v := range c.want {
				scale = math.Max(scale, math.Abs(v))
			}
			for i := range c.want {
				// PyTorch 1.13 (Debian python3-torch), float32 on both sides.
				require.InDelta(t, c.want[i], c.got[i], 1e-5*scale, "%s %s[%d]", s.Name, c.name, i)
			}
		}
	}
}

// TestSteadyStateMemory runs 2000 gradient and integrated-gradients calls
// and checks that the live heap after a collection does not grow between
// call 200 and call 2000: every pass's buffers are released or reused
// (a bound of 256 KiB for 1800 calls, i.e. under 150 bytes per call; common
// practice for a leak check).
func TestSteadyStateMemory(t *testing.T) {
	s, err := Lookup("mlp-s")
	require.NoError(t, err)
	h := zooHead(t, s)
	x := Input(s, 1)
	ctx := context.Background()
	heap := func() uint64 {
		runtime.GC()
		runtime.GC()
		var ms runtime.MemStats
		runtime.ReadMemStats(&ms)
		return ms.HeapAlloc
	}
	var mark uint64
	const calls = 2000
	for i := 0; i < calls; i++ {
		if i == 200 {
			mark = heap()
		}
		var err error
		if i%2 == 0 {
			_, err = gradattr.Gradient(ctx, h, x, 0, gradattr.GradientOptions{})
		} else {
			_, err = gradattr.IntegratedGradients(ctx, h, x, 1, gradattr.IGOptions{Points: 64})
		}
		require.NoError(t, err)
	}
	end := heap()
	growth := int64(end) - int64(mark)
	t.Logf("heap after GC: %d bytes at call 200, %d at call %d (growth %d)", mark, end, calls, growth)
	assert.Less(t, growth, int64(256<<10), "live heap grew by %d bytes over %d calls", growth, calls-200)
}
