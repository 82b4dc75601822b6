package onnxlite

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"testing"

	"github.com/apportion/apportion/internal/debpython"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"github.com/x448/float16"

	"github.com/apportion/apportion/internal/onnxtestdata"
)

func mustTensor(t testing.TB, name string, dt DataType, dims []int64, data any) *Tensor {
	t.Helper()
	tn, err := NewTensor(name, dt, dims, data)
	require.NoError(t, err)
	return tn
}

// everyKindModel builds a model that uses every element type, attribute
// kind and type arm onnxlite represents, with NaN payloads and signed zeros.
func everyKindModel(t testing.TB) *Model {
	// IEEE 754 binary32 0x7FC00001 and binary64 0x7FF0000000000001 are NaNs
	// with payloads (the latter signaling); 0x80000000 is -0.
	nan32 := math.Float32frombits(0x7FC00001)
	nan64 := math.Float64frombits(0x7FF0000000000001)
	negZero := math.Float32frombits(0x80000000)
	inits := []*Tensor{
		mustTensor(t, "f32", Float, []int64{2, 2}, []float32{1, nan32, negZero, float32(math.Inf(-1))}),
		mustTensor(t, "f64", Double, []int64{2}, []float64{nan64, -1e300}),
		mustTensor(t, "f16", Float16, []int64{3}, []float16.Float16{0x3C00, 0x7E01, 0x8000}),
		mustTensor(t, "bf16", BFloat16, []int64{2}, []BFloat16Bits{0x3F80, 0xFFC1}),
		mustTensor(t, "i8", Int8, []int64{2}, []int8{-128, 127}),
		mustTensor(t, "u8", Uint8, []int64{2}, []uint8{0, 255}),
		mustTensor(t, "i16", Int16, []int64{2}, []int16{-32768, 32767}),
		mustTensor(t, "u16", Uint16, []int64{1}, []uint16{65535}),
		mustTensor(t, "i32", Int32, []int64{2}, []int32{math.MinInt32, math.MaxInt32}),
		mustTensor(t, "u32", Uint32, []int64{1}, []uint32{math.MaxUint32}),
		mustTensor(t, "i64", Int64, nil, []int64{math.MinInt64}),
		mustTensor(t, "u64", Uint64, []int64{1}, []uint64{math.MaxUint64}),
		mustTensor(t, "b", Bool, []int64{3}, []bool{true, false, true}),
		mustTensor(t, "s", String, []int64{3}, [][]byte{[]byte("héllo"), {}, {0, 0xFF}}),
		mustTensor(t, "c64", Complex64, []int64{1}, []complex64{complex(nan32, -2)}),
		mustTensor(t, "c128", Complex128, []int64{1}, []complex128{complex(1, nan64)}),
		mustTensor(t, "empty", Float, []int64{0, 3}, []float32{}),
	}
	inits[0].DocString = "weights"
	dim := func(v int64) Dim { return Dim{Value: v, HasValue: true} }
	tensorType := &Type{Kind: KindTensor, Elem: Float, HasShape: true, Shape: []Dim{
		{Param: "batch", Denotation: "DATA_BATCH"}, dim(0), dim(3), {}}}
	return &Model{
		IRVersion: 8, ProducerName: "apportion-test", ProducerVersion: "0.1", Domain: "org.example",
		ModelVersion: 42, DocString: "a model with every kind",
		Opsets:   []OpsetImport{{Domain: "", Version: 13}, {Domain: "com.example", Version: 1}},
		Metadata: map[string]string{"zeta": "last", "alpha": "first", "feature_names": "a,b,c"},
		Graph: &Graph{
			Name: "g", DocString: "graph doc", Initializers: inits,
			Nodes: []*Node{
				{Name: "n0", OpType: "MyOp", Domain: "com.example", Inputs: []string{"x", "", "f32"}, Outputs: []string{"y"}, DocString: "node doc",
					Attrs: []*Attribute{
						{Name: "f", Type: AttrFloat, F: nan32},
						{Name: "fz", Type: AttrFloat, F: 0},
						{Name: "i", Type: AttrInt, I: -7},
						{Name: "s", Type: AttrString, S: "same_upper", DocString: "attr doc"},
						{Name: "t", Type: AttrTensor, T: mustTensor(t, "", Float, nil, []float32{2.5})},
						{Name: "fs", Type: AttrFloats, Floats: []float32{1, -0.5, nan32}},
						{Name: "is", Type: AttrInts, Ints: []int64{-1, 0, math.MaxInt64}},
						{Name: "ss", Type: AttrStrings, Strings: []string{"a", ""}},
						{Name: "ts", Type: AttrTensors, Tensors: []*Tensor{inits[4], inits[13]}},
						{Name: "ref", Type: AttrInt, RefAttrName: "outer"},
						{Name: "emptyints", Type: AttrInts},
					}},
				{OpType: "Relu", Inputs: []string{"y"}, Outputs: []string{"z"}},
			},
			Inputs: []*ValueInfo{{Name: "x", Type: tensorType, DocString: "input doc"}},
			Outputs: []*ValueInfo{
				{Name: "z", Type: &Type{Kind: KindTensor, Elem: Float}},
				{Name: "scalar", Type: &Type{Kind: KindTensor, Elem: Int64, HasShape: true}},
				{Name: "untyped"},
			},
			ValueInfo: []*ValueInfo{
				{Name: "seq", Type: &Type{Kind: KindSequence, Inner: &Type{Kind: KindTensor, Elem: Double}}},
				{Name: "map", Type: &Type{Kind: KindMap, Key: Int64, Inner: &Type{Kind: KindTensor, Elem: Float}}},
				{Name: "opt", Type: &Type{Kind: KindOptional, Inner: &Type{Kind: KindSequence, Inner: &Type{Kind: KindTensor, Elem: Bool}}}},
				{Name: "sp", Type: &Type{Kind: KindSparseTensor, Elem: Float, HasShape: true, Shape: []Dim{dim(5), dim(5)}}},
				{Name: "denoted", Type: &Type{Kind: KindTensor, Elem: Uint8, Denotation: "IMAGE"}},
				{Name: "unknown", Type: &Type{}},
			},
		},
	}
}

func TestEncodeDecodeEveryKind(t *testing.T) {
	m := everyKindModel(t)
	var buf bytes.Buffer
	require.NoError(t, Encode(&buf, m))
	first := append([]byte(nil), buf.Bytes()...)
	m2, err := Decode(&buf, DecodeOptions{})
	require.NoError(t, err)
	assert.Equal(t, "", irDiff(m, m2), "Decode(Encode(m)) must equal m, comparing floats by bits")

	// Deterministic: the same model encodes to the same bytes, whatever the
	// map iteration order of Metadata.
	for i := 0; i < 5; i++ {
		var again bytes.Buffer
		require.NoError(t, Encode(&again, m2))
		require.Equal(t, first, again.Bytes())
	}
}

func TestEncodeTensorRoundTrip(t *testing.T) {
	for _, tn := range everyKindModel(t).Graph.Initializers {
		var buf bytes.Buffer
		require.NoError(t, EncodeTensor(&buf, tn))
		tn2, err := DecodeTensor(&buf, DecodeOptions{})
		require.NoError(t, err, tn.Name)
		assert.Equal(t, "", irDiff(tn, tn2), tn.Name)
	}
}

func TestEncodeRefusesBadIR(t *testing.T) {
	var buf bytes.Buffer
	assert.Error(t, Encode(&buf, nil))
	bad := &Model{Graph: &Graph{Initializers: []*Tensor{{Name: "w", DType: Float, Dims: []int64{2}, Data: []float32{1}}}}}
	assert.ErrorContains(t, Encode(&buf, bad), "dims [2] need 2 elements, data has 1")
	bad.Graph.Initializers[0].Data = []float64{1, 2}
	assert.ErrorContains(t, Encode(&buf, bad), "FLOAT data must be []float32, got []float64")
	sub := &Model{Graph: &Graph{Nodes: []*Node{{OpType: "If", Attrs: []*Attribute{{Name: "then_branch", Type: AttrGraph}}}}}}
	assert.ErrorIs(t, Encode(&buf, sub), ErrSubgraph)
	nilT := &Model{Graph: &Graph{Nodes: []*Node{{OpType: "Constant", Attrs: []*Attribute{{Name: "value", Type: AttrTensor}}}}}}
	assert.ErrorContains(t, Encode(&buf, nilT), "nil tensor")
	assert.Error(t, EncodeTensor(&buf, nil))
}

// TestEncodeReadByONNX has the reference implementation, python3-onnx
// 1.12.0, load a model written by Encode, run its checker and report the
// fields back.
func TestEncodeReadByONNX(t *testing.T) {
	python := debpython.Require(t, "onnx")
	dir := onnxtestdata.Dir(t)
	m, err := DecodeFile(filepath.Join(dir, "node/test_conv_with_strides_padding/model.onnx"), DecodeOptions{})
	require.NoError(t, err)
	m.Metadata = map[string]string{"b": "2", "a": "1"}
	w := mustTensor(t, "extra", Float16, []int64{2}, []float16.Float16{0x3C00, 0xC000}) // 1, -2 (IEEE 754 binary16)
	m.Graph.Initializers = append(m.Graph.Initializers, w)
	path := filepath.Join(t.TempDir(), "model.onnx")
	f, err := os.Create(path)
	require.NoError(t, err)
	require.NoError(t, Encode(f, m))
	require.NoError(t, f.Close())

	script := `
import json, sys, onnx
from onnx import numpy_helper
m = onnx.load(sys.argv[1])
onnx.checker.check_model(m)
n = m.graph.node[0]
print(json.dumps({
  "ir": m.ir_version,
  "opset": [o.version for o in m.opset_import],
  "meta": [[p.key, p.value] for p in m.metadata_props],
  "op": n.op_type, "inputs": list(n.input),
  "attrs": {a.name: list(a.ints) for a in n.attribute},
  "extra": numpy_helper.to_array(m.graph.initializer[-1]).astype(float).tolist(),
  "in_shape": [d.dim_value for d in m.graph.input[0].type.tensor_type.shape.dim],
}))`
	out, err := exec.Command(python, "-c", script, path).CombinedOutput()
	require.NoError(t, err, "%s", out)
	var got struct {
		IR      int64              `json:"ir"`
		Opset   []int64            `json:"opset"`
		Meta    [][2]string        `json:"meta"`
		Op      string             `json:"op"`
		Inputs  []string           `json:"inputs"`
		Attrs   map[string][]int64 `json:"attrs"`
		Extra   []float64          `json:"extra"`
		InShape []int64            `json:"in_shape"`
	}
	require.NoError(t, json.Unmarshal(out, &got), "%s", out)
	assert.Equal(t, m.IRVersion, got.IR)
	assert.Equal(t, []int64{m.Opsets[0].Version}, got.Opset)
	assert.Equal(t, [][2]string{{"a", "1"}, {"b", "2"}}, got.Meta, "metadata_props sorted by key")
	n := m.Graph.Nodes[0]
	assert.Equal(t, n.OpType, got.Op)
	assert.Equal(t, n.Inputs, got.Inputs)
	for _, a := range n.Attrs {
		assert.Equal(t, a.Ints, got.Attrs[a.Name], a.Name)
	}
	assert.Equal(t, []float64{1, -2}, got.Extra)
	var shape []int64
	for _, d := range m.Graph.Inputs[0].Type.Shape {
		shape = append(shape, d.Value)
	}
	assert.Equal(t, shape, got.InShape)
}

// Encode a one-node model built in Go and read it back.
func ExampleEncode() {
	w, err := NewTensor("w", Float, []int64{3}, []float32{0.5, -1, 2}) // demo weights
	if err != nil {
		fmt.Println(err)
		return
	}
	m := &Model{
		IRVersion: 8,
		Opsets:    []OpsetImport{{Version: 13}},
		Metadata:  map[string]string{"feature_names": "age,income,tenure"},
		Graph: &Graph{
			Name:         "scale",
			Nodes:        []*Node{{OpType: "Mul", Inputs: []string{"x", "w"}, Outputs: []string{"y"}}},
			Initializers: []*Tensor{w},
			Inputs:       []*ValueInfo{{Name: "x", Type: &Type{Kind: KindTensor, Elem: Float, HasShape: true, Shape: []Dim{{Param: "batch"}, {Value: 3, HasValue: true}}}}},
			Outputs:      []*ValueInfo{{Name: "y", Type: &Type{Kind: KindTensor, Elem: Float}}},
		},
	}
	var buf bytes.Buffer
	if err := Encode(&buf, m); err != nil {
		fmt.Println(err)
		return
	}
	back, err := Decode(&buf, DecodeOptions{})
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Println(back.Graph.Nodes[0].OpType, back.Graph.Initializers[0].Data, back.Metadata["feature_names"])
	// Output: Mul [0.5 -1 2] age,income,tenure
}
