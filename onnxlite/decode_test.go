package onnxlite

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"runtime"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"google.golang.org/protobuf/encoding/protowire"

	"github.com/apportion/apportion/internal/onnxtestdata"
)

// irDiff compares two IR values field by field, like reflect.DeepEqual but
// comparing floating-point values by their bits so that NaN payloads count,
// and returns the path of the first difference ("" when equal).
func irDiff(a, b any) string {
	return valueDiff("", reflect.ValueOf(a), reflect.ValueOf(b))
}

func valueDiff(path string, a, b reflect.Value) string {
	if a.IsValid() != b.IsValid() {
		return path + ": one side invalid"
	}
	if !a.IsValid() {
		return ""
	}
	if a.Type() != b.Type() {
		return fmt.Sprintf("%s: type %v vs %v", path, a.Type(), b.Type())
	}
	switch a.Kind() {
	case reflect.Float32:
		if math.Float32bits(float32(a.Float())) != math.Float32bits(float32(b.Float())) {
			return fmt.Sprintf("%s: %v vs %v", path, a.Float(), b.Float())
		}
	case reflect.Float64:
		if math.Float64bits(a.Float()) != math.Float64bits(b.Float()) {
			return fmt.Sprintf("%s: %v vs %v", path, a.Float(), b.Float())
		}
	case reflect.Complex64, reflect.Complex128:
		x, y := a.Complex(), b.Complex()
		if a.Kind() == reflect.Complex64 {
			if math.Float32bits(float32(real(x))) != math.Float32bits(float32(real(y))) ||
				math.Float32bits(float32(imag(x))) != math.Float32bits(float32(imag(y))) {
				return fmt.Sprintf("%s: %v vs %v", path, x, y)
			}
		} else if math.Float64bits(real(x)) != math.Float64bits(real(y)) || math.Float64bits(imag(x)) != math.Float64bits(imag(y)) {
			return fmt.Sprintf("%s: %v vs %v", path, x, y)
		}
	case reflect.Pointer, reflect.Interface:
		if a.IsNil() != b.IsNil() {
			return path + ": nil vs non-nil"
		}
		if !a.IsNil() {
			return valueDiff(path, a.Elem(), b.Elem())
		}
	case reflect.Slice:
		if a.IsNil() != b.IsNil() {
			return path + ": nil vs non-nil slice"
		}
		if a.Len() != b.Len() {
			return fmt.Sprintf("%s: len %d vs %d", path, a.Len(), b.Len())
		}
		for i := 0; i < a.Len(); i++ {
			if d := valueDiff(fmt.Sprintf("%s[%d]", path, i), a.Index(i), b.Index(i)); d != "" {
				return d
			}
		}
	case reflect.Map:
		if a.IsNil() != b.IsNil() || a.Len() != b.Len() {
			return path + ": maps differ in size or nil-ness"
		}
		for _, k := range a.MapKeys() {
			bv := b.MapIndex(k)
			if !bv.IsValid() {
				return fmt.Sprintf("%s[%v]: missing", path, k)
			}
			if d := valueDiff(fmt.Sprintf("%s[%v]", path, k), a.MapIndex(k), bv); d != "" {
				return d
			}
		}
	case reflect.Struct:
		for i := 0; i < a.NumField(); i++ {
			if d := valueDiff(path+"."+a.Type().Field(i).Name, a.Field(i), b.Field(i)); d != "" {
				return d
			}
		}
	default:
		if !reflect.DeepEqual(a.Interface(), b.Interface()) {
			return fmt.Sprintf("%s: %v vs %v", path, a.Interface(), b.Interface())
		}
	}
	return ""
}

// roundTripModel encodes m, decodes the bytes again and returns the result.
func roundTripModel(t testing.TB, m *Model, opts DecodeOptions) *Model {
	t.Helper()
	var buf bytes.Buffer
	require.NoError(t, Encode(&buf, m))
	m2, err := Decode(&buf, opts)
	require.NoError(t, err)
	return m2
}

func backendModel(t *testing.T, rel string) (*Model, []byte) {
	t.Helper()
	dir := onnxtestdata.Dir(t)
	path := filepath.Join(dir, rel)
	raw, err := os.ReadFile(path)
	require.NoError(t, err)
	m, err := DecodeFile(path, DecodeOptions{})
	require.NoError(t, err)
	return m, raw
}

func TestDecodeRelu(t *testing.T) {
	m, _ := backendModel(t, "node/test_relu/model.onnx")
	// Values read from the file with python3-onnx 1.12.0 (onnx.load(...); print(m)).
	assert.Equal(t, int64(7), m.IRVersion)
	assert.Equal(t, "backend-test", m.ProducerName)
	require.Len(t, m.Opsets, 1)
	assert.Equal(t, OpsetImport{Domain: "", Version: 14}, m.Opsets[0])
	g := m.Graph
	require.NotNil(t, g)
	assert.Equal(t, "test_relu", g.Name)
	require.Len(t, g.Nodes, 1)
	assert.Equal(t, &Node{OpType: "Relu", Inputs: []string{"x"}, Outputs: []string{"y"}}, g.Nodes[0])
	require.Len(t, g.Inputs, 1)
	assert.Equal(t, "x", g.Inputs[0].Name)
	want := &Type{Kind: KindTensor, Elem: Float, HasShape: true, Shape: []Dim{
		{Value: 3, HasValue: true}, {Value: 4, HasValue: true}, {Value: 5, HasValue: true}}}
	assert.Equal(t, want, g.Inputs[0].Type)
	require.Len(t, g.Outputs, 1)
	assert.Equal(t, "y", g.Outputs[0].Name)
	assert.Equal(t, want, g.Outputs[0].Type)
}

func TestDecodeReluInput(t *testing.T) {
	dir := onnxtestdata.Dir(t)
	tn, err := DecodeTensorFile(filepath.Join(dir, "node/test_relu/test_data_set_0/input_0.pb"), DecodeOptions{})
	require.NoError(t, err)
	// Read from the file with python3-onnx 1.12.0 and numpy_helper.to_array:
	// name 'x', dims [3 4 5], FLOAT in 240 bytes of raw_data, first three
	// elements with bit patterns 1071762552, 1053614440, 1064996499.
	assert.Equal(t, "x", tn.Name)
	assert.Equal(t, Float, tn.DType)
	assert.Equal(t, []int64{3, 4, 5}, tn.Dims)
	assert.Equal(t, []int{3, 4, 5}, tn.Shape())
	assert.Equal(t, int64(60), tn.NumElements())
	f := tn.Data.([]float32)
	require.Len(t, f, 60)
	assert.Equal(t, []uint32{1071762552, 1053614440, 1064996499},
		[]uint32{math.Float32bits(f[0]), math.Float32bits(f[1]), math.Float32bits(f[2])})
}

func TestDecodeLeakyReluAttribute(t *testing.T) {
	m, _ := backendModel(t, "node/test_leakyrelu/model.onnx")
	// Read from the file with python3-onnx 1.12.0: one LeakyRelu node whose
	// FLOAT attribute alpha is 0.10000000149011612 (float32 nearest to 0.1).
	require.Len(t, m.Graph.Nodes, 1)
	n := m.Graph.Nodes[0]
	assert.Equal(t, "LeakyRelu", n.OpType)
	require.Len(t, n.Attrs, 1)
	assert.Equal(t, &Attribute{Name: "alpha", Type: AttrFloat, F: float32(0.1)}, n.Attrs[0])
	assert.Equal(t, float32(0.1), n.AttrFloat("alpha", 0))
}

// Wire-format helpers for hand-built messages. Field numbers are those of
// onnx.proto as installed by python3-onnx 1.12.0; the encoding is the
// Protocol Buffers wire format (protobuf.dev/programming-guides/encoding).
func pbBytes(b []byte, num protowire.Number, v []byte) []byte {
	b = protowire.AppendTag(b, num, protowire.BytesType)
	return protowire.AppendBytes(b, v)
}

func pbString(b []byte, num protowire.Number, s string) []byte { return pbBytes(b, num, []byte(s)) }

func pbVarint(b []byte, num protowire.Number, v uint64) []byte {
	b = protowire.AppendTag(b, num, protowire.VarintType)
	return protowire.AppendVarint(b, v)
}

// pbModel wraps graph bytes in a ModelProto with ir_version 8 and opset 13.
func pbModel(graph []byte) []byte {
	var b []byte
	b = pbVarint(b, 1, 8)                                    // ir_version
	b = pbBytes(b, 8, pbVarint(pbString(nil, 1, ""), 2, 13)) // opset_import
	return pbBytes(b, 7, graph)                              // graph
}

func pbNode(op, name string, attrs ...[]byte) []byte {
	var b []byte
	b = pbString(b, 1, "x") // input
	b = pbString(b, 2, "y") // output
	b = pbString(b, 3, name)
	b = pbString(b, 4, op)
	for _, a := range attrs {
		b = pbBytes(b, 5, a)
	}
	return b
}

func TestDecodeTruncatedPrefixes(t *testing.T) {
	dir := onnxtestdata.Dir(t)
	for _, rel := range []string{"node/test_leakyrelu/model.onnx", "node/test_conv_with_strides_padding/model.onnx", "node/test_gemm_default_single_elem_vector_bias/model.onnx"} {
		raw, err := os.ReadFile(filepath.Join(dir, rel))
		require.NoError(t, err)
		full, err := Decode(bytes.NewReader(raw), DecodeOptions{})
		require.NoError(t, err)
		var ok, bad int
		for n := 0; n < len(raw); n++ {
			m, err := Decode(bytes.NewReader(raw[:n]), DecodeOptions{})
			if err != nil {
				require.ErrorIs(t, err, ErrMalformed, "%s prefix %d", rel, n)
				bad++
				continue
			}
			// A prefix that ends on a field boundary of the ModelProto is a
			// valid message with fewer fields (protobuf wire format).
			require.NotEqual(t, "", irDiff(full, m), "%s prefix %d decoded to the full model", rel, n)
			ok++
		}
		t.Logf("%s: %d bytes, %d prefixes decoded, %d refused as malformed", rel, len(raw), ok, bad)
		assert.Greater(t, bad, len(raw)/2)
	}
}

func TestDecodeMalformedSaysWhere(t *testing.T) {
	// attribute[1] of node[3] holds a varint cut after a continuation byte
	// (wire format: the high bit of each varint byte says more bytes follow).
	cut := append(pbString(nil, 1, "alpha"), byte(protowire.EncodeTag(3, protowire.VarintType)), 0x80)
	good := pbVarint(pbString(nil, 1, "k"), 3, 1)
	var g []byte
	for i := 0; i < 3; i++ {
		g = pbBytes(g, 1, pbNode("Relu", fmt.Sprint("n", i)))
	}
	g = pbBytes(g, 1, pbNode("LeakyRelu", "n3", good, cut))
	_, err := Decode(bytes.NewReader(pbModel(g)), DecodeOptions{})
	require.ErrorIs(t, err, ErrMalformed)
	assert.Contains(t, err.Error(), "graph.node[3].attribute[1]: truncated")

	// A length prefix that runs past the end of the buffer.
	b := pbModel(nil)
	b = append(b, byte(protowire.EncodeTag(7, protowire.BytesType)), 50, 1, 2)
	_, err = Decode(bytes.NewReader(b), DecodeOptions{})
	require.ErrorIs(t, err, ErrMalformed)
	assert.Contains(t, err.Error(), "model: truncated")

	// op_type (NodeProto field 4) is a string; a varint there is a wrong wire type.
	n := pbVarint(pbString(nil, 1, "x"), 4, 7)
	_, err = Decode(bytes.NewReader(pbModel(pbBytes(nil, 1, n))), DecodeOptions{})
	require.ErrorIs(t, err, ErrMalformed)
	assert.Contains(t, err.Error(), "graph.node[0]: field op_type (4): wire type varint, want length-delimited")

	// Field number 0 is invalid in the wire format.
	_, err = Decode(bytes.NewReader([]byte{0x00, 0x01}), DecodeOptions{})
	require.ErrorIs(t, err, ErrMalformed)
}

func TestDecodeSkipsUnknownFields(t *testing.T) {
	node := pbNode("Relu", "r")
	withUnknown := pbVarint(append([]byte{}, node...), 99, 5)
	withUnknown = pbBytes(withUnknown, 1000, []byte("future"))
	withUnknown = protowire.AppendTag(withUnknown, 77, protowire.Fixed64Type)
	withUnknown = protowire.AppendFixed64(withUnknown, 1)
	a, err := Decode(bytes.NewReader(pbModel(pbBytes(nil, 1, node))), DecodeOptions{})
	require.NoError(t, err)
	b, err := Decode(bytes.NewReader(pbModel(pbBytes(nil, 1, withUnknown))), DecodeOptions{})
	require.NoError(t, err)
	assert.Equal(t, "", irDiff(a, b)) // protobuf wire format: unknown fields are skipped
	assert.Equal(t, &Node{Name: "r", OpType: "Relu", Inputs: []string{"x"}, Outputs: []string{"y"}}, b.Graph.Nodes[0])
}

func TestDecodeRefusesSubgraphs(t *testing.T) {
	dir := onnxtestdata.Dir(t)
	_, err := DecodeFile(filepath.Join(dir, "node/test_if/model.onnx"), DecodeOptions{})
	require.ErrorIs(t, err, ErrSubgraph)
	// Read from the file with python3-onnx 1.12.0: one unnamed If node whose
	// first attribute is else_branch (a GRAPH).
	assert.Contains(t, err.Error(), `node "" (If)`)
	assert.Contains(t, err.Error(), `attribute "else_branch" is GRAPH-valued`)

	// A GRAPHS attribute (AttributeProto field 11, type 10) built by hand.
	attr := pbVarint(pbBytes(pbString(nil, 1, "bodies"), 11, nil), 20, uint64(AttrGraphs))
	_, err = Decode(bytes.NewReader(pbModel(pbBytes(nil, 1, pbNode("MyOp", "m", attr)))), DecodeOptions{})
	require.ErrorIs(t, err, ErrSubgraph)
	assert.Contains(t, err.Error(), `node "m" (MyOp)`)
	assert.Contains(t, err.Error(), `"bodies" is GRAPHS-valued`)
}

func TestDecodeRefusesSparseAndTypeAttributes(t *testing.T) {
	// Constant's sparse_value: AttributeProto.sparse_tensor (22), type SPARSE_TENSOR (11).
	sparse := pbVarint(pbBytes(pbString(nil, 1, "sparse_value"), 22, nil), 20, uint64(AttrSparse))
	_, err := Decode(bytes.NewReader(pbModel(pbBytes(nil, 1, pbNode("Constant", "c", sparse)))), DecodeOptions{})
	require.ErrorIs(t, err, ErrUnsupportedEncoding)
	assert.Contains(t, err.Error(), `node "c" (Constant)`)
	assert.Contains(t, err.Error(), `"sparse_value" is SPARSE_TENSOR-valued`)

	// GraphProto.sparse_initializer (15).
	_, err = Decode(bytes.NewReader(pbModel(pbBytes(nil, 15, nil))), DecodeOptions{})
	require.ErrorIs(t, err, ErrUnsupportedEncoding)
	assert.Contains(t, err.Error(), "graph.sparse_initializer")

	// AttributeProto.tp (14), type TYPE_PROTO (13).
	tp := pbVarint(pbBytes(pbString(nil, 1, "dtype"), 14, nil), 20, uint64(AttrTypeProto))
	_, err = Decode(bytes.NewReader(pbModel(pbBytes(nil, 1, pbNode("MyOp", "t", tp)))), DecodeOptions{})
	require.ErrorIs(t, err, ErrUnsupportedEncoding)
	assert.Contains(t, err.Error(), `"dtype" is TYPE_PROTO-valued`)
	assert.False(t, errors.Is(err, ErrSubgraph))
}

// floatInit is a FLOAT initializer of n zero elements in raw_data.
func floatInit(name string, n int) []byte {
	b := pbVarint(nil, 1, uint64(n))
	b = pbVarint(b, 2, uint64(Float))
	b = pbString(b, 8, name)
	return pbBytes(b, 9, make([]byte, 4*n))
}

func requireLimit(t *testing.T, err error, limit string, value, most int64) {
	t.Helper()
	require.ErrorIs(t, err, ErrLimit)
	var le *LimitError
	require.ErrorAs(t, err, &le)
	assert.Equal(t, LimitError{Limit: limit, Value: value, Max: most}, *le)
	assert.Contains(t, err.Error(), limit)
	assert.Contains(t, err.Error(), fmt.Sprint(most))
}

func TestLimits(t *testing.T) {
	dir := onnxtestdata.Dir(t)
	relu, err := os.ReadFile(filepath.Join(dir, "node/test_relu/model.onnx"))
	require.NoError(t, err)
	_, err = Decode(bytes.NewReader(relu), DecodeOptions{Limits: Limits{MaxModelBytes: 50}})
	requireLimit(t, err, "MaxModelBytes", 51, 50)
	_, err = Decode(bytes.NewReader(relu), DecodeOptions{Limits: Limits{MaxModelBytes: int64(len(relu))}})
	require.NoError(t, err, "a model of exactly MaxModelBytes is allowed")

	tensor2d := pbTensor(Float, []int64{10, 10}, pbBytes(nil, 9, make([]byte, 400)))
	_, err = DecodeTensor(bytes.NewReader(tensor2d), DecodeOptions{Limits: Limits{MaxTensorElements: 50}})
	requireLimit(t, err, "MaxTensorElements", 100, 50)

	g := pbBytes(nil, 5, floatInit("a", 10))
	g = pbBytes(g, 5, floatInit("b", 10))
	_, err = Decode(bytes.NewReader(pbModel(g)), DecodeOptions{Limits: Limits{MaxInitializerBytes: 60}})
	requireLimit(t, err, "MaxInitializerBytes", 80, 60)
	_, err = Decode(bytes.NewReader(pbModel(g)), DecodeOptions{Limits: Limits{MaxInitializerBytes: 80}})
	require.NoError(t, err)

	var nodes []byte
	for i := 0; i < 3; i++ {
		nodes = pbBytes(nodes, 1, pbNode("Relu", fmt.Sprint(i)))
	}
	_, err = Decode(bytes.NewReader(pbModel(nodes)), DecodeOptions{Limits: Limits{MaxNodes: 2}})
	requireLimit(t, err, "MaxNodes", 3, 2)

	ints := pbVarint(pbBytes(pbString(nil, 1, "pads"), 8, []byte{1, 2, 3}), 20, uint64(AttrInts))
	_, err = Decode(bytes.NewReader(pbModel(pbBytes(nil, 1, pbNode("Pad", "p", ints)))), DecodeOptions{Limits: Limits{MaxTensorElements: 2}})
	requireLimit(t, err, "MaxTensorElements", 3, 2)

	_, err = DecodeTensor(bytes.NewReader(pbTensor(Float, []int64{1, 1, 1}, pbBytes(nil, 9, make([]byte, 4)))), DecodeOptions{Limits: Limits{MaxRank: 2}})
	requireLimit(t, err, "MaxRank", 3, 2)
	// The relu input is declared with rank 3 (python3-onnx 1.12.0 print of the file).
	_, err = Decode(bytes.NewReader(relu), DecodeOptions{Limits: Limits{MaxRank: 2}})
	requireLimit(t, err, "MaxRank", 3, 2)
	assert.Contains(t, err.Error(), "graph.input[0].type.tensor_type.shape.dim[2]")
}

func TestHugeDimsDoNotAllocate(t *testing.T) {
	// 2^40 * 2^40 = 2^80 overflows int64; 2^40 alone passes a MaxInt64
	// element limit but its 4-byte raw_data / one float_data value disagree
	// with the dims. Each must fail before anything of the dims' size exists.
	huge := pbTensor(Float, []int64{1 << 40, 1 << 40}, pbBytes(nil, 9, make([]byte, 4)))
	rawShort := pbTensor(Float, []int64{1 << 40}, pbBytes(nil, 9, make([]byte, 4)))
	typedShort := pbTensor(Float, []int64{1 << 40}, pbBytes(nil, 4, make([]byte, 4)))
	noLimit := DecodeOptions{Limits: Limits{MaxTensorElements: math.MaxInt64, MaxInitializerBytes: math.MaxInt64}}

	_, err := DecodeTensor(bytes.NewReader(huge), DecodeOptions{})
	requireLimit(t, err, "MaxTensorElements", math.MaxInt64, DefaultLimits.MaxTensorElements)
	assert.Contains(t, err.Error(), "overflows int64")
	_, err = DecodeTensor(bytes.NewReader(rawShort), noLimit)
	require.ErrorIs(t, err, ErrMalformed)
	_, err = DecodeTensor(bytes.NewReader(typedShort), noLimit)
	require.ErrorIs(t, err, ErrMalformed)

	var before, after runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&before)
	for i := 0; i < 10; i++ {
		_, _ = DecodeTensor(bytes.NewReader(huge), DecodeOptions{})
		_, _ = DecodeTensor(bytes.NewReader(rawShort), noLimit)
		_, _ = DecodeTensor(bytes.NewReader(typedShort), noLimit)
	}
	runtime.ReadMemStats(&after)
	allocated := after.TotalAlloc - before.TotalAlloc
	t.Logf("30 refused decodes allocated %d bytes in total", allocated)
	assert.Less(t, allocated, uint64(1<<20), "a refused 2^40-element tensor must not allocate its data")
}

func TestDecodeSkipsModelFunctions(t *testing.T) {
	// ModelProto.functions (25) holds FunctionProtos (onnx.proto, IR version 8):
	// name 1, input 4, output 5, node 7, domain 10. A node calling the
	// function decodes as an ordinary node of the function's domain.
	fn := pbString(nil, 1, "Twice")
	fn = pbString(fn, 4, "a")
	fn = pbString(fn, 5, "b")
	fn = pbBytes(fn, 7, pbNode("Add", "inner"))
	fn = pbString(fn, 10, "local.funcs")
	call := pbString(pbNode("Twice", "call"), 7, "local.funcs")
	b := pbModel(pbBytes(nil, 1, call))
	b = pbBytes(b, 8, pbVarint(pbString(nil, 1, "local.funcs"), 2, 1))
	b = pbBytes(b, 25, fn)
	m, err := Decode(bytes.NewReader(b), DecodeOptions{})
	require.NoError(t, err)
	require.Len(t, m.Graph.Nodes, 1)
	assert.Equal(t, &Node{Name: "call", OpType: "Twice", Domain: "local.funcs", Inputs: []string{"x"}, Outputs: []string{"y"}}, m.Graph.Nodes[0])
	assert.Equal(t, int64(1), m.OpsetVersion("local.funcs"))
}

func BenchmarkDecode(b *testing.B) {
	dir := onnxtestdata.Dir(b)
	// The backend models keep their weights in the inputs; this 7 KB one
	// has among the most nodes.
	raw, err := os.ReadFile(filepath.Join(dir, "node/test_layer_normalization_3d_axis_negative_2_epsilon_expanded/model.onnx"))
	require.NoError(b, err)
	b.SetBytes(int64(len(raw)))
	for b.Loop() {
		if _, err := Decode(bytes.NewReader(raw), DecodeOptions{}); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkEncode(b *testing.B) {
	dir := onnxtestdata.Dir(b)
	m, err := DecodeFile(filepath.Join(dir, "node/test_layer_normalization_3d_axis_negative_2_epsilon_expanded/model.onnx"), DecodeOptions{})
	require.NoError(b, err)
	var buf bytes.Buffer
	for b.Loop() {
		buf.Reset()
		if err := Encode(&buf, m); err != nil {
			b.Fatal(err)
		}
	}
	b.SetBytes(int64(buf.Len()))
}

func BenchmarkDecodeTensor(b *testing.B) {
	dir := onnxtestdata.Dir(b)
	// A 4 MB FLOAT tensor in raw_data, the largest test-data file.
	raw, err := os.ReadFile(filepath.Join(dir, "pytorch-converted/test_MaxPool2d_stride_padding_dilation/test_data_set_0/input_0.pb"))
	require.NoError(b, err)
	b.SetBytes(int64(len(raw)))
	for b.Loop() {
		if _, err := DecodeTensor(bytes.NewReader(raw), DecodeOptions{}); err != nil {
			b.Fatal(err)
		}
	}
}
