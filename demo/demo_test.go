package demo

import (
	"bytes"
	"encoding/csv"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/apportion/apportion/internal/debpython"

	"codeberg.org/sbinet/npyio/npy"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

func TestNamesAndGet(t *testing.T) {
	assert.Equal(t, []string{"pumps", "tickets", "welds"}, Names())

	s, err := Get("")
	require.NoError(t, err)
	assert.Equal(t, Default, s.Name)
	assert.Equal(t, "pumps", s.Name)

	_, err = Get("turbines")
	require.ErrorIs(t, err, ErrUnknown)
	assert.Contains(t, err.Error(), `"turbines"`)
	assert.Contains(t, err.Error(), "pumps, tickets, welds")

	// Every file a scenario names is embedded, and nothing else is but the README.
	named := map[string]bool{"README.md": true}
	for _, n := range Names() {
		s, err := Get(n)
		require.NoError(t, err)
		require.NotEmpty(t, s.Model)
		require.NotEmpty(t, s.Sample)
		require.NotEmpty(t, s.Reference)
		for _, f := range append([]string{s.ModelFile, s.SampleFile, s.ReferenceFile}, s.Test...) {
			named[f] = true
			_, err := File(f)
			require.NoError(t, err, f)
		}
	}
	for _, f := range Files() {
		assert.True(t, named[f], "embedded file %s belongs to no scenario", f)
	}
	_, err = File("missing.onnx")
	require.Error(t, err)

	// Get hands out copies: changing one does not change the next.
	a, err := Get("pumps")
	require.NoError(t, err)
	a.Model[0] ^= 0xff
	b, err := Get("pumps")
	require.NoError(t, err)
	assert.NotEqual(t, a.Model[0], b.Model[0])
}

// TestFileSizes keeps the embedded files small (size budget of the demo:
// models under 200 KB each, test sets under 2 MB in all; common practice for
// files compiled into a binary).
func TestFileSizes(t *testing.T) {
	testBytes := 0
	for _, n := range Names() {
		s, err := Get(n)
		require.NoError(t, err)
		assert.Less(t, len(s.Model), 200<<10, s.ModelFile)
		for _, f := range s.Test {
			b, err := File(f)
			require.NoError(t, err)
			testBytes += len(b)
		}
	}
	assert.Less(t, testBytes, 2<<20)
}

// wantModel is what the ONNX header and signature of a demo model must be.
type wantModel struct {
	input, output string
	elem          onnxlite.DataType // of the input
	inShape       []int64           // after the symbolic batch dimension
	outClasses    []string
	metaKeys      []string
}

var wantModels = map[string]wantModel{
	"pumps": {
		input: "sensors", output: "condition", inShape: []int64{8}, elem: onnxlite.Float,
		outClasses: []string{"normal", "degraded", "failing"},
		metaKeys:   []string{"feature_names", "feature_units", "class_names", "scenario", "description"},
	},
	"welds": {
		input: "patch", output: "verdict", inShape: []int64{1, 32, 32}, elem: onnxlite.Float,
		outClasses: []string{"clean", "defective"},
		metaKeys:   []string{"class_names", "scenario", "description"},
	},
	"tickets": {
		input: "note", output: "triage", inShape: []int64{16}, elem: onnxlite.Int64,
		outClasses: []string{"urgent", "routine", "informational"},
		metaKeys:   []string{"class_names", "vocabulary", "scenario", "description"},
	},
}

func decodeModel(t *testing.T, name string) *onnxlite.Model {
	t.Helper()
	s, err := Get(name)
	require.NoError(t, err)
	m, err := onnxlite.Decode(bytes.NewReader(s.Model), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	require.NoError(t, m.Validate())
	return m
}

func TestModelsDecode(t *testing.T) {
	for name, want := range wantModels {
		t.Run(name, func(t *testing.T) {
			m := decodeModel(t, name)
			// The export settings (ONNX IR version 8, default-domain opset
			// 13); TestONNXChecker has the ONNX checker accept the pair.
			assert.EqualValues(t, 8, m.IRVersion)
			assert.EqualValues(t, 13, m.OpsetVersion(""))
			assert.Equal(t, "apportion-train", m.ProducerName)

			require.Len(t, m.Graph.Inputs, 1)
			in := m.Graph.Inputs[0]
			assert.Equal(t, want.input, in.Name)
			require.NotNil(t, in.Type)
			assert.Equal(t, want.elem, in.Type.Elem)
			require.Len(t, in.Type.Shape, 1+len(want.inShape))
			assert.Equal(t, "batch", in.Type.Shape[0].Param)
			assert.False(t, in.Type.Shape[0].HasValue)
			for i, d := range want.inShape {
				assert.True(t, in.Type.Shape[i+1].HasValue)
				assert.Equal(t, d, in.Type.Shape[i+1].Value)
			}
			require.Len(t, m.Graph.Outputs, 1)
			out := m.Graph.Outputs[0]
			assert.Equal(t, want.output, out.Name)
			require.Len(t, out.Type.Shape, 2)
			assert.Equal(t, "batch", out.Type.Shape[0].Param)
			assert.EqualValues(t, len(want.outClasses), out.Type.Shape[1].Value)

			for _, k := range want.metaKeys {
				assert.Contains(t, m.Metadata, k)
			}
			assert.Equal(t, name, m.Metadata["scenario"])
			var classes []string
			require.NoError(t, json.Unmarshal([]byte(m.Metadata["class_names"]), &classes))
			assert.Equal(t, want.outClasses, classes)
		})
	}

	m := decodeModel(t, "pumps")
	var names, units []string
	require.NoError(t, json.Unmarshal([]byte(m.Metadata["feature_names"]), &names))
	require.NoError(t, json.Unmarshal([]byte(m.Metadata["feature_units"]), &units))
	assert.Len(t, units, 8)
	// The reference set's header is the model's feature names.
	ref, err := File("pumps_reference.csv")
	require.NoError(t, err)
	header, err := csv.NewReader(bytes.NewReader(ref)).Read()
	require.NoError(t, err)
	assert.Equal(t, header, names)
}

// tensor is a dense float32 array for the reference interpreter below.
type tensor struct {
	dims []int
	data []float32
}

func (t tensor) size(from int) int {
	n := 1
	for _, d := range t.dims[from:] {
		n *= d
	}
	return n
}

// evalGraph runs m on input with a plain-Go interpreter of the operators
// the demo models use, written from the ONNX operator specifications
// (opset 13: Sub, Div, Gemm, Relu, Softmax, Conv, MaxPool, Flatten), and
// returns the graph output.
func evalGraph(t *testing.T, m *onnxlite.Model, input tensor) tensor {
	t.Helper()
	env := map[string]tensor{m.Graph.Inputs[0].Name: input}
	for _, in := range m.Graph.Initializers {
		f, ok := in.Data.([]float32)
		require.True(t, ok, "initializer %s is %s, want float", in.Name, in.DType)
		dims := make([]int, len(in.Dims))
		for i, d := range in.Dims {
			dims[i] = int(d)
		}
		env[in.Name] = tensor{dims, f}
	}
	for _, n := range m.Graph.Nodes {
		args := make([]tensor, len(n.Inputs))
		for i, name := range n.Inputs {
			v, ok := env[name]
			require.True(t, ok, "node %s: input %q undefined", n.Name, name)
			args[i] = v
		}
		var out tensor
		switch n.OpType {
		case "Sub", "Div":
			out = broadcastRow(t, n, args[0], args[1])
		case "Gemm":
			out = gemm(t, n, args)
		case "Relu":
			out = tensor{args[0].dims, make([]float32, len(args[0].data))}
			for i, v := range args[0].data {
				out.data[i] = max(v, 0)
			}
		case "Softmax":
			out = softmax(t, n, args[0])
		case "Conv":
			out = conv2d(t, n, args)
		case "MaxPool":
			out = maxPool(t, n, args[0])
		case "Flatten":
			axis := int(n.AttrInt("axis", 1))
			out = tensor{[]int{args[0].size(0) / args[0].size(axis), args[0].size(axis)}, args[0].data}
		default:
			t.Fatalf("node %s: operator %s not in the reference interpreter", n.Name, n.OpType)
		}
		env[n.Outputs[0]] = out
	}
	return env[m.Graph.Outputs[0].Name]
}

// broadcastRow applies Sub or Div to a [N, D] tensor and a [D] tensor
// (ONNX multidirectional broadcasting, docs/Broadcasting.md).
func broadcastRow(t *testing.T, n *onnxlite.Node, a, b tensor) tensor {
	require.Len(t, a.dims, 2, n.Name)
	require.Equal(t, []int{a.dims[1]}, b.dims, n.Name)
	out := tensor{a.dims, make([]float32, len(a.data))}
	d := a.dims[1]
	for i, v := range a.data {
		if n.OpType == "Sub" {
			out.data[i] = v - b.data[i%d]
		} else {
			out.data[i] = v / b.data[i%d]
		}
	}
	return out
}

// gemm is Y = alpha·A'·B' + beta·C (ONNX Gemm-13 specification).
func gemm(t *testing.T, n *onnxlite.Node, args []tensor) tensor {
	a, b := args[0], args[1]
	alpha, beta := n.AttrFloat("alpha", 1), n.AttrFloat("beta", 1)
	transA, transB := n.AttrInt("transA", 0) == 1, n.AttrInt("transB", 0) == 1
	require.Len(t, a.dims, 2, n.Name)
	require.Len(t, b.dims, 2, n.Name)
	M, K := a.dims[0], a.dims[1]
	if transA {
		M, K = K, M
	}
	K2, N := b.dims[0], b.dims[1]
	if transB {
		K2, N = N, K2
	}
	require.Equal(t, K, K2, "node %s: inner dimensions", n.Name)
	at := func(i, k int) float32 {
		if transA {
			return a.data[k*M+i]
		}
		return a.data[i*K+k]
	}
	bt := func(k, j int) float32 {
		if transB {
			return b.data[j*K+k]
		}
		return b.data[k*N+j]
	}
	out := tensor{[]int{M, N}, make([]float32, M*N)}
	for i := range M {
		for j := range N {
			var s float32
			for k := range K {
				s += at(i, k) * bt(k, j)
			}
			s *= alpha
			if len(args) > 2 {
				c := args[2]
				switch c.size(0) {
				case N:
					s += beta * c.data[j]
				case M * N:
					s += beta * c.data[i*N+j]
				default:
					t.Fatalf("node %s: bias of %v elements for a %d×%d output", n.Name, c.dims, M, N)
				}
			}
			out.data[i*N+j] = s
		}
	}
	return out
}

// softmax is exp(x_i)/Σ_j exp(x_j) along the last axis (ONNX Softmax-13).
func softmax(t *testing.T, n *onnxlite.Node, x tensor) tensor {
	axis := int(n.AttrInt("axis", -1))
	if axis < 0 {
		axis += len(x.dims)
	}
	require.Equal(t, len(x.dims)-1, axis, "node %s: softmax over the last axis only", n.Name)
	k := x.dims[axis]
	out := tensor{x.dims, make([]float32, len(x.data))}
	for r := 0; r < len(x.data); r += k {
		m := x.data[r]
		for _, v := range x.data[r : r+k] {
			m = max(m, v)
		}
		var s float64
		for j := range k {
			s += math.Exp(float64(x.data[r+j] - m))
		}
		for j := range k {
			out.data[r+j] = float32(math.Exp(float64(x.data[r+j]-m)) / s)
		}
	}
	return out
}

// conv2d is the ONNX Conv-11 cross-correlation of NCHW x with W [M, C, kh,
// kw], bias B [M], group 1.
func conv2d(t *testing.T, n *onnxlite.Node, args []tensor) tensor {
	x, w := args[0], args[1]
	require.EqualValues(t, 1, n.AttrInt("group", 1), n.Name)
	require.Len(t, x.dims, 4, n.Name)
	N, C, H, W := x.dims[0], x.dims[1], x.dims[2], x.dims[3]
	M, kh, kw := w.dims[0], w.dims[2], w.dims[3]
	require.Equal(t, C, w.dims[1], n.Name)
	pads := n.AttrInts("pads", []int64{0, 0, 0, 0})
	strides := n.AttrInts("strides", []int64{1, 1})
	dil := n.AttrInts("dilations", []int64{1, 1})
	pt, pl := int(pads[0]), int(pads[1])
	sh, sw := int(strides[0]), int(strides[1])
	dh, dw := int(dil[0]), int(dil[1])
	OH := (H+int(pads[0])+int(pads[2])-dh*(kh-1)-1)/sh + 1
	OW := (W+int(pads[1])+int(pads[3])-dw*(kw-1)-1)/sw + 1
	out := tensor{[]int{N, M, OH, OW}, make([]float32, N*M*OH*OW)}
	for b := range N {
		for m := range M {
			for oy := range OH {
				for ox := range OW {
					var s float32
					if len(args) > 2 {
						s = args[2].data[m]
					}
					for c := range C {
						for ky := range kh {
							iy := oy*sh - pt + ky*dh
							if iy < 0 || iy >= H {
								continue
							}
							for kx := range kw {
								ix := ox*sw - pl + kx*dw
								if ix < 0 || ix >= W {
									continue
								}
								s += x.data[((b*C+c)*H+iy)*W+ix] * w.data[((m*C+c)*kh+ky)*kw+kx]
							}
						}
					}
					out.data[((b*M+m)*OH+oy)*OW+ox] = s
				}
			}
		}
	}
	return out
}

// maxPool is ONNX MaxPool-12 over NCHW x; padded cells never win.
func maxPool(t *testing.T, n *onnxlite.Node, x tensor) tensor {
	require.Len(t, x.dims, 4, n.Name)
	k := n.AttrInts("kernel_shape", nil)
	require.Len(t, k, 2, n.Name)
	strides := n.AttrInts("strides", []int64{1, 1})
	pads := n.AttrInts("pads", []int64{0, 0, 0, 0})
	N, C, H, W := x.dims[0], x.dims[1], x.dims[2], x.dims[3]
	kh, kw, sh, sw := int(k[0]), int(k[1]), int(strides[0]), int(strides[1])
	OH := (H+int(pads[0])+int(pads[2])-kh)/sh + 1
	OW := (W+int(pads[1])+int(pads[3])-kw)/sw + 1
	out := tensor{[]int{N, C, OH, OW}, make([]float32, N*C*OH*OW)}
	for p := range N * C {
		for oy := range OH {
			for ox := range OW {
				m := float32(math.Inf(-1))
				for ky := range kh {
					iy := oy*sh - int(pads[0]) + ky
					for kx := range kw {
						ix := ox*sw - int(pads[1]) + kx
						if iy >= 0 && iy < H && ix >= 0 && ix < W {
							m = max(m, x.data[(p*H+iy)*W+ix])
						}
					}
				}
				out.data[(p*OH+oy)*OW+ox] = m
			}
		}
	}
	return out
}

// argmaxRows returns the argmax of each row of a [N, K] tensor, and checks
// that each row is a probability distribution (softmax outputs sum to 1:
// closed form, up to float32 rounding).
func argmaxRows(t *testing.T, y tensor) []int {
	t.Helper()
	require.Len(t, y.dims, 2)
	k := y.dims[1]
	idx := make([]int, y.dims[0])
	for i := range idx {
		row := y.data[i*k : (i+1)*k]
		var s float64
		for j, v := range row {
			s += float64(v)
			if v > row[idx[i]] {
				idx[i] = j
			}
		}
		require.InDelta(t, 1, s, 1e-5, "row %d", i)
	}
	return idx
}

// TestPumpsHeldOutAccuracy recomputes the pumps model's accuracy on the
// committed held-out set (pumps_test.csv and its labels are the source of
// truth) with the plain-Go interpreter over the decoded initializers.
func TestPumpsHeldOutAccuracy(t *testing.T) {
	m := decodeModel(t, "pumps")
	raw, err := File("pumps_test.csv")
	require.NoError(t, err)
	recs, err := csv.NewReader(bytes.NewReader(raw)).ReadAll()
	require.NoError(t, err)
	require.Len(t, recs, 501)
	assert.Equal(t, "pump_line", recs[0][8])
	assert.Equal(t, "label", recs[0][9])

	var classes []string
	require.NoError(t, json.Unmarshal([]byte(m.Metadata["class_names"]), &classes))
	x := tensor{[]int{500, 8}, make([]float32, 0, 500*8)}
	labels := make([]int, 500)
	counts := make([]int, len(classes))
	for i, r := range recs[1:] {
		for _, f := range r[:8] {
			v, err := strconv.ParseFloat(f, 64)
			require.NoError(t, err)
			x.data = append(x.data, float32(v))
		}
		labels[i] = indexOf(classes, r[9])
		require.GreaterOrEqual(t, labels[i], 0, "row %d label %q", i+1, r[9])
		counts[labels[i]]++
		assert.Contains(t, []string{"A", "B", "C"}, r[8])
	}
	pred := argmaxRows(t, evalGraph(t, m, x))
	acc := accuracy(pred, labels)
	majority := float64(max(counts[0], counts[1], counts[2])) / 500
	t.Logf("pumps held-out accuracy %.3f, majority class %.3f", acc, majority)
	assert.GreaterOrEqual(t, acc, 0.85)
	assert.Greater(t, acc, majority+0.2)

	// The sample to explain is a failing pump, and the model says so.
	s, err := Get("pumps")
	require.NoError(t, err)
	var sample []float64
	require.NoError(t, json.Unmarshal(s.Sample, &sample))
	require.Len(t, sample, 8)
	in := tensor{[]int{1, 8}, make([]float32, 8)}
	for i, v := range sample {
		in.data[i] = float32(v)
	}
	assert.Equal(t, s.SampleClass, classes[argmaxRows(t, evalGraph(t, m, in))[0]])
}

// TestWeldsHeldOutAccuracy recomputes the welds model's accuracy on the
// committed held-out patches and labels with the plain-Go interpreter.
func TestWeldsHeldOutAccuracy(t *testing.T) {
	m := decodeModel(t, "welds")
	var patches []float32
	shape := readNPY(t, "welds_test_patches.npy", &patches)
	require.Equal(t, []int{200, 1, 32, 32}, shape)
	var lab []int64
	require.Equal(t, []int{200, 2}, readNPY(t, "welds_test_labels.npy", &lab))
	var masks []uint8
	require.Equal(t, []int{200, 32, 32}, readNPY(t, "welds_test_masks.npy", &masks))

	labels := make([]int, 200)
	defective := 0
	for i := range labels {
		labels[i] = int(lab[2*i])
		kind := lab[2*i+1]
		marked := 0
		for _, v := range masks[i*1024 : (i+1)*1024] {
			marked += int(v)
		}
		// A clean patch has no defect kind and an empty mask; a defective
		// one a crack (1) or porosity (2) and a non-empty mask.
		if labels[i] == 0 {
			assert.EqualValues(t, 0, kind, "patch %d", i)
			assert.Zero(t, marked, "patch %d", i)
		} else {
			defective++
			assert.Contains(t, []int64{1, 2}, kind, "patch %d", i)
			assert.Positive(t, marked, "patch %d", i)
		}
	}
	for _, v := range patches {
		require.True(t, v >= 0 && v <= 1, "grey level %v outside [0, 1]", v)
	}
	pred := argmaxRows(t, evalGraph(t, m, tensor{shape, patches}))
	acc := accuracy(pred, labels)
	majority := float64(max(defective, 200-defective)) / 200
	t.Logf("welds held-out accuracy %.3f, majority class %.3f", acc, majority)
	assert.GreaterOrEqual(t, acc, 0.90)

	s, err := Get("welds")
	require.NoError(t, err)
	var sample [][][]float32
	require.NoError(t, json.Unmarshal(s.Sample, &sample))
	require.Len(t, sample, 1)
	require.Len(t, sample[0], 32)
	in := tensor{[]int{1, 1, 32, 32}, make([]float32, 0, 1024)}
	for _, row := range sample[0] {
		require.Len(t, row, 32)
		in.data = append(in.data, row...)
	}
	var classes []string
	require.NoError(t, json.Unmarshal([]byte(m.Metadata["class_names"]), &classes))
	assert.Equal(t, s.SampleClass, classes[argmaxRows(t, evalGraph(t, m, in))[0]])

	var ref []float32
	require.Equal(t, []int{32, 1, 32, 32}, readNPY(t, "welds_reference.npy", &ref))
}

func readNPY(t *testing.T, name string, ptr any) []int {
	t.Helper()
	b, err := File(name)
	require.NoError(t, err)
	r, err := npy.NewReader(bytes.NewReader(b))
	require.NoError(t, err, name)
	require.False(t, r.Header.Descr.Fortran, name)
	require.NoError(t, r.Read(ptr), name)
	return r.Header.Descr.Shape
}

func indexOf(list []string, s string) int {
	for i, v := range list {
		if v == s {
			return i
		}
	}
	return -1
}

func accuracy(pred, labels []int) float64 {
	ok := 0
	for i := range pred {
		if pred[i] == labels[i] {
			ok++
		}
	}
	return float64(ok) / float64(len(pred))
}

// TestONNXChecker runs the ONNX project's checker (onnx.checker.check_model
// with full_check, which includes strict shape inference) on both models,
// and has numpy read the .npy files, when Debian's python3-onnx is present.
func TestONNXChecker(t *testing.T) {
	onnxPython := debpython.Require(t, "onnx", "numpy")
	dir := t.TempDir()
	for _, f := range Files() {
		b, err := File(f)
		require.NoError(t, err)
		require.NoError(t, os.WriteFile(filepath.Join(dir, f), b, 0o644))
	}
	script := `
import sys, onnx, numpy as np
d = sys.argv[1]
for name, inp, shape, out in [("pumps", "sensors", ["batch", 8], ["batch", 3]),
                              ("welds", "patch", ["batch", 1, 32, 32], ["batch", 2]),
                              ("tickets", "note", ["batch", 16], ["batch", 3])]:
    m = onnx.load(d + "/" + name + ".onnx")
    onnx.checker.check_model(m, full_check=True)
    g = onnx.shape_inference.infer_shapes(m, strict_mode=True).graph
    dims = lambda v: [x.dim_param or x.dim_value for x in v.type.tensor_type.shape.dim]
    assert g.input[0].name == inp and dims(g.input[0]) == shape, dims(g.input[0])
    assert dims(g.output[0]) == out, dims(g.output[0])
    print(name, "ok", m.ir_version, m.opset_import[0].version)
p = np.load(d + "/welds_test_patches.npy"); k = np.load(d + "/welds_test_masks.npy")
l = np.load(d + "/welds_test_labels.npy"); r = np.load(d + "/welds_reference.npy")
assert p.dtype == np.float32 and p.shape == (200, 1, 32, 32)
assert k.dtype == np.uint8 and k.shape == (200, 32, 32)
assert l.dtype == np.int64 and l.shape == (200, 2)
assert r.dtype == np.float32 and r.shape == (32, 1, 32, 32)
t = np.load(d + "/tickets_test_truth.npy")
assert t.dtype == np.int64 and t.shape == (600, 2)
print("npy ok", int(l[:, 0].sum()))
`
	out, err := exec.Command(onnxPython, "-c", script, dir).CombinedOutput()
	require.NoError(t, err, "%s", out)
	lines := strings.Fields(string(out))
	assert.Equal(t, []string{"pumps", "ok", "8", "13", "welds", "ok", "8", "13", "tickets", "ok", "8", "13", "npy", "ok"}, lines[:14], fmt.Sprint(lines))
}
