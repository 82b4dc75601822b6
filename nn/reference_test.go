package nn_test

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"codeberg.org/sbinet/npyio/npz"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// The fixtures in testdata/reference were written by generate.py there: small
// PyTorch models exported with torch.onnx.export, and their outputs and input
// gradients computed by float64 torch.autograd (Debian python3-torch 1.13.1,
// torch.__version__ 1.13.0a0) on the exported float32 weights, upcast exactly.
// They are committed, so these tests never skip.

const referenceDir = "../testdata/reference"

// referenceManifest is testdata/reference/manifest.json.
type referenceManifest struct {
	Torch  string `json:"torch"`
	Models []struct {
		ONNX         string   `json:"onnx"`
		Fixture      string   `json:"fixture"`
		Opset        int      `json:"opset"`
		InputShape   []int    `json:"input_shape"`
		DynamicBatch bool     `json:"dynamic_batch"`
		Ops          []string `json:"ops"`
		Nodes        []string `json:"nodes"`
		InputDType   string   `json:"input_dtype"`
	} `json:"models"`
	Tokens struct {
		Fixture string `json:"fixture"`
		ONNX    string `json:"onnx"`
		Value   string `json:"value"`
	} `json:"tokens"`
}

func loadReferenceManifest(t *testing.T) referenceManifest {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(referenceDir, "manifest.json"))
	require.NoError(t, err)
	var m referenceManifest
	require.NoError(t, json.Unmarshal(b, &m))
	require.NotEmpty(t, m.Models)
	return m
}

// referenceArrays reads the named arrays of an .npz fixture.
type referenceArrays struct {
	t *testing.T
	r *npz.Reader
}

func openReference(t *testing.T, name string) referenceArrays {
	t.Helper()
	r, err := npz.Open(filepath.Join(referenceDir, name))
	require.NoError(t, err)
	t.Cleanup(func() { r.Close() })
	return referenceArrays{t, r}
}

func (a referenceArrays) f64(name string) []float64 {
	a.t.Helper()
	var v []float64
	require.NoError(a.t, a.r.Read(name+".npy", &v), name)
	return v
}

func (a referenceArrays) ints(name string) []int {
	a.t.Helper()
	var v []int64
	require.NoError(a.t, a.r.Read(name+".npy", &v), name)
	out := make([]int, len(v))
	for i, x := range v {
		out[i] = int(x)
	}
	return out
}

func (a referenceArrays) has(name string) bool {
	for _, k := range a.r.Keys() {
		if k == name+".npy" {
			return true
		}
	}
	return false
}

// relL1 is Σ|got − want| / Σ|want|.
func relL1(got, want []float64) float64 {
	var num, den float64
	for i := range want {
		num += math.Abs(got[i] - want[i])
		den += math.Abs(want[i])
	}
	return num / den
}

// relMax is max|got − want| / max|want|.
func relMax(got, want []float64) float64 {
	var num, den float64
	for i := range want {
		num = math.Max(num, math.Abs(got[i]-want[i]))
		den = math.Max(den, math.Abs(want[i]))
	}
	return num / den
}

// TestReferenceTorch runs every exported model of testdata/reference on its
// ten held-out rows, in one batch, on both engines, and compares outputs and
// ∂out[target]/∂x with float64 torch.autograd (python3-torch 1.13.1).
func TestReferenceTorch(t *testing.T) {
	man := loadReferenceManifest(t)
	for _, mm := range man.Models {
		if mm.InputDType == "int64" {
			continue // token ids: TestReferenceTextModel
		}
		t.Run(mm.ONNX, func(t *testing.T) {
			fx := openReference(t, mm.Fixture)
			x, wantOut, wantGrad := fx.f64("x"), fx.f64("out"), fx.f64("grad")
			target := fx.ints("target")
			rows := len(target)
			require.Equal(t, 10, rows)
			features := len(x) / rows
			classes := len(wantOut) / rows

			model, err := onnxlite.DecodeFile(filepath.Join(referenceDir, mm.ONNX), onnxlite.DecodeOptions{})
			require.NoError(t, err)
			require.Equal(t, int64(mm.Opset), model.OpsetVersion(""), "opset recorded by the generator")

			for _, tc := range []struct {
				dt              nn.DType
				outTol, gradTol float64
			}{
				// Float32 engine: float32 rounding of every op (common practice
				// for a single-precision forward pass of a few layers).
				{nn.Float32, 1e-5, 1e-4},
				// Float64 engine: the same arithmetic as float64 torch up to
				// summation order.
				{nn.Float64, 1e-9, 1e-9},
			} {
				t.Run(tc.dt.String(), func(t *testing.T) {
					nw, err := nn.Compile(model, nn.Options{DType: tc.dt})
					require.NoError(t, err)
					h, err := nw.Head(nn.Selection{})
					require.NoError(t, err)
					require.Equal(t, mm.InputShape, h.InputShape())
					require.Equal(t, classes, h.OutputSize())

					out, grad, err := h.Gradient(context.Background(), x, rows, target)
					require.NoError(t, err)
					require.Len(t, out, rows*classes)
					require.Len(t, grad, rows*features)
					fwd, err := h.Forward(context.Background(), x, rows)
					require.NoError(t, err)
					var worstOut, worstGrad float64
					for r := 0; r < rows; r++ {
						o, w := out[r*classes:(r+1)*classes], wantOut[r*classes:(r+1)*classes]
						// float64 torch.autograd reference (python3-torch 1.13.1)
						assert.LessOrEqual(t, relMax(o, w), tc.outTol, "row %d outputs %v, torch %v", r, o, w)
						assert.LessOrEqual(t, relMax(fwd[r*classes:(r+1)*classes], w), tc.outTol, "row %d Forward", r)
						g, wg := grad[r*features:(r+1)*features], wantGrad[r*features:(r+1)*features]
						// float64 torch.autograd reference (python3-torch 1.13.1)
						assert.LessOrEqual(t, relL1(g, wg), tc.gradTol, "row %d gradient of output %d", r, target[r])
						worstOut = math.Max(worstOut, relMax(o, w))
						worstGrad = math.Max(worstGrad, relL1(g, wg))
					}
					t.Logf("worst row: outputs %.1e relative, gradient %.1e relative L1", worstOut, worstGrad)
				})
			}
		})
	}
}

// TestReferenceBatchIndependence checks on the exported models that a
// sample's gradient does not depend on the batch it is run in: row r alone
// gives the float64 torch.autograd value of row r within the batch.
func TestReferenceBatchIndependence(t *testing.T) {
	man := loadReferenceManifest(t)
	for _, mm := range man.Models {
		if mm.InputDType == "int64" {
			continue // token ids: TestReferenceTextModel
		}
		t.Run(mm.ONNX, func(t *testing.T) {
			fx := openReference(t, mm.Fixture)
			x, wantGrad := fx.f64("x"), fx.f64("grad")
			target := fx.ints("target")
			features := len(x) / len(target)
			model, err := onnxlite.DecodeFile(filepath.Join(referenceDir, mm.ONNX), onnxlite.DecodeOptions{})
			require.NoError(t, err)
			nw, err := nn.Compile(model, nn.Options{DType: nn.Float64, MaxBatch: 3})
			require.NoError(t, err)
			h, err := nw.Head(nn.Selection{})
			require.NoError(t, err)
			for _, r := range []int{0, 7} {
				_, g, err := h.Gradient(context.Background(), x[r*features:(r+1)*features], 1, target[r:r+1])
				require.NoError(t, err)
				// float64 torch.autograd reference (python3-torch 1.13.1)
				assert.LessOrEqual(t, relL1(g, wantGrad[r*features:(r+1)*features]), 1e-9, "row %d alone", r)
			}
			// Ten rows in chunks of MaxBatch = 3 (3+3+3+1).
			_, g, err := h.Gradient(context.Background(), x, len(target), target)
			require.NoError(t, err)
			// float64 torch.autograd reference (python3-torch 1.13.1)
			assert.LessOrEqual(t, relL1(g, wantGrad), 1e-9, "chunked batch")
		})
	}
}

// TestReferenceExportedOps checks that the exporter's graphs hold the
// operators the fixtures were made to exercise, as listed by generate.py
// from the ONNX files themselves (python3-onnx 1.12.0).
func TestReferenceExportedOps(t *testing.T) {
	man := loadReferenceManifest(t)
	for _, mm := range man.Models {
		model, err := onnxlite.DecodeFile(filepath.Join(referenceDir, mm.ONNX), onnxlite.DecodeOptions{})
		require.NoError(t, err, mm.ONNX)
		seen := map[string]bool{}
		for _, n := range model.Graph.Nodes {
			seen[n.OpType] = true
			assert.True(t, onnxlite.IsSupported(n.Domain, n.OpType), "%s: %s", mm.ONNX, n.OpType)
		}
		got := make([]string, 0, len(seen))
		for op := range seen {
			got = append(got, op)
		}
		// The op list onnx.load read from the same file (python3-onnx 1.12.0).
		assert.ElementsMatch(t, mm.Ops, got, mm.ONNX)
		assert.Empty(t, nn.Unsupported(model), mm.ONNX)
	}
}

// TestReferenceLogits differentiates the Softmax input of the models that end
// in a Softmax (Selection.Logits) and compares with float64 torch.autograd of
// the module's logits; on the models whose output is a Gemm, Logits must be
// refused.
func TestReferenceLogits(t *testing.T) {
	man := loadReferenceManifest(t)
	checked := 0
	for _, mm := range man.Models {
		if mm.InputDType == "int64" {
			continue // token ids: TestReferenceTextModel
		}
		t.Run(mm.ONNX, func(t *testing.T) {
			fx := openReference(t, mm.Fixture)
			model, err := onnxlite.DecodeFile(filepath.Join(referenceDir, mm.ONNX), onnxlite.DecodeOptions{})
			require.NoError(t, err)
			last := mm.Nodes[len(mm.Nodes)-1] // node order onnx.load read (python3-onnx 1.12.0)
			for _, tc := range []struct {
				dt  nn.DType
				tol float64
			}{{nn.Float32, 1e-4}, {nn.Float64, 1e-9}} {
				nw, err := nn.Compile(model, nn.Options{DType: tc.dt})
				require.NoError(t, err)
				h, err := nw.Head(nn.Selection{Logits: true})
				if last != "Softmax" {
					assert.False(t, fx.has("logit_grad"))
					require.Error(t, err, "the graph output comes from %s, not a Softmax", last)
					assert.ErrorIs(t, err, nn.ErrBadRequest)
					return
				}
				require.NoError(t, err)
				require.True(t, fx.has("logit_grad"))
				x, want, target := fx.f64("x"), fx.f64("logit_grad"), fx.ints("target")
				_, g, err := h.Gradient(context.Background(), x, len(target), target)
				require.NoError(t, err)
				// float64 torch.autograd of the logits (python3-torch 1.13.1)
				assert.LessOrEqual(t, relL1(g, want), tc.tol, tc.dt.String())
				checked++
			}
		})
	}
	assert.Equal(t, 6, checked, "three Softmax models, two engines")
}

// TestReferenceTextModel runs the text classifier of testdata/reference,
// whose int64 token ids feed an embedding Gather, on both engines: its
// logits against float64 torch (python3-torch 1.13.1), and the gradient of
// the target logit at the embedding output against ∂F/∂E of the fixture,
// taken on the graph cut at that value (E becomes the graph's input, so
// the engine differentiates everything downstream of the lookup).
func TestReferenceTextModel(t *testing.T) {
	man := loadReferenceManifest(t)
	tok := man.Tokens
	require.NotEmpty(t, tok.ONNX)
	fx := openReference(t, tok.Fixture)
	ids, wantOut, target := fx.ints("ids"), fx.f64("out"), fx.ints("target")
	emb, wantGrad := fx.f64("emb"), fx.f64("emb_grad")
	rows := len(target)
	length := len(ids) / rows
	classes := len(wantOut) / rows
	model, err := onnxlite.DecodeFile(filepath.Join(referenceDir, tok.ONNX), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	idData := make([]int64, len(ids))
	for i, v := range ids {
		idData[i] = int64(v)
	}
	idTensor := &onnxlite.Tensor{Name: model.Graph.Inputs[0].Name, DType: onnxlite.Int64,
		Dims: []int64{int64(rows), int64(length)}, Data: idData}
	cut := cutAt(t, model, tok.Value, []int64{-1, int64(length), int64(len(emb) / len(ids))})
	for _, tc := range []struct {
		dt              nn.DType
		outTol, gradTol float64
	}{{nn.Float32, 1e-5, 1e-4}, {nn.Float64, 1e-9, 1e-9}} {
		t.Run(tc.dt.String(), func(t *testing.T) {
			nw, err := nn.Compile(model, nn.Options{DType: tc.dt})
			require.NoError(t, err)
			outs, err := nw.Forward(context.Background(), []*onnxlite.Tensor{idTensor})
			require.NoError(t, err)
			got, err := outs[0].Float64s()
			require.NoError(t, err)
			for r := 0; r < rows; r++ {
				// float64 torch reference (python3-torch 1.13.1)
				assert.LessOrEqual(t, relMax(got[r*classes:(r+1)*classes], wantOut[r*classes:(r+1)*classes]), tc.outTol, "row %d logits", r)
			}
			_, err = nw.Head(nn.Selection{})
			assert.ErrorIs(t, err, nn.ErrBadRequest, "token ids have no gradient")

			// An id beyond the vocabulary (text_cnn_vocab.txt: 40 tokens) is
			// the data's fault, not the engine's.
			words, err := os.ReadFile(filepath.Join(referenceDir, "text_cnn_vocab.txt"))
			require.NoError(t, err)
			vocab := len(strings.Fields(string(words)))
			bad := *idTensor
			bad.Data = append([]int64{int64(vocab)}, idData[1:]...)
			_, err = nw.Forward(context.Background(), []*onnxlite.Tensor{&bad})
			assert.ErrorIs(t, err, nn.ErrBadRequest)
			assert.NotErrorIs(t, err, nn.ErrEngine)
			assert.Contains(t, err.Error(), fmt.Sprintf("Gather index %d at position 0 of its indices is out of range: expected a whole number from %d to %d", vocab, -vocab, vocab-1))

			cnw, err := nn.Compile(cut, nn.Options{DType: tc.dt})
			require.NoError(t, err)
			h, err := cnw.Head(nn.Selection{})
			require.NoError(t, err)
			out, grad, err := h.Gradient(context.Background(), emb, rows, target)
			require.NoError(t, err)
			per := len(emb) / rows
			for r := 0; r < rows; r++ {
				// float64 torch.autograd reference (python3-torch 1.13.1)
				assert.LessOrEqual(t, relMax(out[r*classes:(r+1)*classes], wantOut[r*classes:(r+1)*classes]), tc.outTol, "row %d logits from E", r)
				assert.LessOrEqual(t, relL1(grad[r*per:(r+1)*per], wantGrad[r*per:(r+1)*per]), tc.gradTol, "row %d ∂F/∂E", r)
			}
		})
	}
}

// cutAt returns a copy of m whose value name is a graph input of the given
// shape (−1: the batch) and whose nodes computing only it are gone.
func cutAt(t *testing.T, m *onnxlite.Model, name string, shape []int64) *onnxlite.Model {
	t.Helper()
	cp := *m
	g := *m.Graph
	g.Nodes = nil
	found := false
	for _, n := range m.Graph.Nodes {
		if len(n.Outputs) == 1 && n.Outputs[0] == name {
			found = true
			continue
		}
		g.Nodes = append(g.Nodes, n)
	}
	require.True(t, found, "no node computes %q", name)
	dims := make([]onnxlite.Dim, len(shape))
	for i, d := range shape {
		if d < 0 {
			dims[i] = onnxlite.Dim{Param: "N"}
		} else {
			dims[i] = onnxlite.Dim{Value: d, HasValue: true}
		}
	}
	g.Inputs = []*onnxlite.ValueInfo{{Name: name, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Float, Shape: dims, HasShape: true}}}
	cp.Graph = &g
	return &cp
}
