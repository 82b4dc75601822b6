package onnxlite

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"

	"google.golang.org/protobuf/encoding/protowire"
)

// DecodeOptions configures Decode and DecodeTensor. The zero value decodes
// with DefaultLimits and refuses external tensor data.
type DecodeOptions struct {
	// Limits bounds what a decode may allocate; zero fields mean DefaultLimits.
	Limits Limits
	// BaseDir is the directory external tensor data is read from. Only files
	// inside it are read. Empty refuses external data with ErrExternalData;
	// DecodeFile and DecodeTensorFile set it to the file's directory when it
	// is empty.
	BaseDir string
}

// maxTypeDepth bounds the nesting of sequence, map and optional types, so
// that a hostile file cannot drive the decoder into unbounded recursion.
const maxTypeDepth = 32

// Decode reads a serialized ONNX ModelProto from r.
//
// Unknown fields are skipped. Malformed wire data is an error wrapping
// ErrMalformed that says where it was found (e.g. "graph.node[3].attribute[1]:
// truncated"); subgraph attributes wrap ErrSubgraph; sparse tensors and
// type-valued attributes wrap ErrUnsupportedEncoding; a limit hit is a
// *LimitError. Model functions and training info are skipped; a node that
// calls a model function decodes as an ordinary node of its domain.
func Decode(r io.Reader, opts DecodeOptions) (*Model, error) {
	return decodeFrom(r, opts, "decode model", func(d *decoder, buf []byte) (*Model, error) {
		return d.model(buf)
	})
}

// DecodeFile decodes the model file at path. External data is read from the
// model's directory unless opts.BaseDir names another one.
func DecodeFile(path string, opts DecodeOptions) (*Model, error) {
	return decodeFileWith(path, opts, Decode)
}

// DecodeTensor reads a bare serialized TensorProto from r, such as the
// input_*.pb and output_*.pb files of the ONNX backend test data.
func DecodeTensor(r io.Reader, opts DecodeOptions) (*Tensor, error) {
	return decodeFrom(r, opts, "decode tensor", func(d *decoder, buf []byte) (*Tensor, error) {
		return d.tensor("tensor", buf)
	})
}

// DecodeTensorFile decodes the TensorProto file at path. External data is
// read from the file's directory unless opts.BaseDir names another one.
func DecodeTensorFile(path string, opts DecodeOptions) (*Tensor, error) {
	return decodeFileWith(path, opts, DecodeTensor)
}

// decodeFrom reads all of r within opts.Limits and decodes the bytes with
// message, prefixing errors with what and turning a panic into an error.
func decodeFrom[T any](r io.Reader, opts DecodeOptions, what string, message func(*decoder, []byte) (T, error)) (v T, err error) {
	var zero T
	d := newDecoder(opts)
	buf, err := d.readAll(r)
	if err != nil {
		return zero, fmt.Errorf("onnxlite: %s: %w", what, err)
	}
	defer recoverTo(&err, what, ErrMalformed)
	v, err = message(d, buf)
	if err != nil {
		return zero, fmt.Errorf("onnxlite: %s: %w", what, err)
	}
	return v, nil
}

// decodeFileWith opens path and decodes it with decode, reading external
// data from the file's directory unless opts.BaseDir is set; errors name the
// file.
func decodeFileWith[T any](path string, opts DecodeOptions, decode func(io.Reader, DecodeOptions) (T, error)) (T, error) {
	var zero T
	f, err := os.Open(path)
	if err != nil {
		return zero, fmt.Errorf("onnxlite: %w", err)
	}
	defer f.Close()
	if opts.BaseDir == "" {
		opts.BaseDir = filepath.Dir(path)
	}
	v, err := decode(f, opts)
	if err != nil {
		return zero, fmt.Errorf("%w (file %s)", err, path)
	}
	return v, nil
}

type decoder struct {
	lim     Limits
	baseDir string
	payload int64 // bytes of tensor payload decoded so far
	// dropRefused makes nodes drop the attributes onnxlite refuses instead
	// of failing, so tests can read the signature of a graph with subgraphs.
	dropRefused bool
}

func newDecoder(opts DecodeOptions) *decoder {
	return &decoder{lim: opts.Limits.withDefaults(), baseDir: opts.BaseDir}
}

func (d *decoder) readAll(r io.Reader) ([]byte, error) {
	if r == nil {
		return nil, errors.New("nil reader")
	}
	var b bytes.Buffer
	n, err := b.ReadFrom(io.LimitReader(r, d.lim.MaxModelBytes+1))
	if err != nil {
		return nil, err
	}
	if n > d.lim.MaxModelBytes {
		return nil, &LimitError{Limit: "MaxModelBytes", Value: n, Max: d.lim.MaxModelBytes}
	}
	return b.Bytes(), nil
}

// addPayload accounts n bytes of tensor payload against MaxInitializerBytes
// before they are allocated.
func (d *decoder) addPayload(n int64) error {
	if n > d.lim.MaxInitializerBytes-d.payload {
		v := d.payload + n
		if v < 0 {
			v = math.MaxInt64
		}
		return &LimitError{Limit: "MaxInitializerBytes", Value: v, Max: d.lim.MaxInitializerBytes}
	}
	d.payload += n
	return nil
}

// field is one decoded protobuf field. For BytesType, val is the payload
// after the length; for the other types it is the encoded value itself.
type field struct {
	num protowire.Number
	typ protowire.Type
	u   uint64 // varint, fixed32 or fixed64 value
	val []byte
}

var wireNames = map[protowire.Type]string{
	protowire.VarintType: "varint", protowire.Fixed32Type: "fixed32",
	protowire.Fixed64Type: "fixed64", protowire.BytesType: "length-delimited",
	protowire.StartGroupType: "start-group", protowire.EndGroupType: "end-group",
}

func malformed(path, format string, args ...any) error {
	return fmt.Errorf("%s: %s: %w", path, fmt.Sprintf(format, args...), ErrMalformed)
}

func wireErr(path string, n int) error {
	err := protowire.ParseError(n)
	msg := err.Error()
	if errors.Is(err, io.ErrUnexpectedEOF) {
		msg = "truncated"
	}
	return malformed(path, "%s", msg)
}

// fields calls fn for every field of the message encoded in buf, in order.
func fields(path string, buf []byte, fn func(f field) error) error {
	for len(buf) > 0 {
		num, typ, n := protowire.ConsumeTag(buf)
		if n < 0 {
			return wireErr(path, n)
		}
		buf = buf[n:]
		f := field{num: num, typ: typ}
		switch typ {
		case protowire.VarintType:
			v, m := protowire.ConsumeVarint(buf)
			if m < 0 {
				return wireErr(path, m)
			}
			f.u, f.val, buf = v, buf[:m], buf[m:]
		case protowire.Fixed32Type:
			v, m := protowire.ConsumeFixed32(buf)
			if m < 0 {
				return wireErr(path, m)
			}
			f.u, f.val, buf = uint64(v), buf[:m], buf[m:]
		case protowire.Fixed64Type:
			v, m := protowire.ConsumeFixed64(buf)
			if m < 0 {
				return wireErr(path, m)
			}
			f.u, f.val, buf = v, buf[:m], buf[m:]
		case protowire.BytesType:
			v, m := protowire.ConsumeBytes(buf)
			if m < 0 {
				return wireErr(path, m)
			}
			f.val, buf = v, buf[m:]
		case protowire.StartGroupType:
			m := protowire.ConsumeFieldValue(num, typ, buf)
			if m < 0 {
				return wireErr(path, m)
			}
			buf = buf[m:]
			continue // groups are never part of ONNX: skip as unknown
		default:
			return malformed(path, "field %d: unexpected wire type %d", num, typ)
		}
		if err := fn(f); err != nil {
			return err
		}
	}
	return nil
}

// want checks the wire type of a known field.
func (f field) want(path, name string, typ protowire.Type) error {
	if f.typ != typ {
		return malformed(path, "field %s (%d): wire type %s, want %s", name, f.num, wireNames[f.typ], wireNames[typ])
	}
	return nil
}

func (f field) str(path, name string) (string, error) {
	if err := f.want(path, name, protowire.BytesType); err != nil {
		return "", err
	}
	return string(f.val), nil
}

func (f field) int64v(path, name string) (int64, error) {
	if err := f.want(path, name, protowire.VarintType); err != nil {
		return 0, err
	}
	return int64(f.u), nil
}

// int32v decodes an int32 or enum field; protobuf sign-extends negative
// int32 values to 64 bits on the wire.
func (f field) int32v(path, name string) (int32, error) {
	if err := f.want(path, name, protowire.VarintType); err != nil {
		return 0, err
	}
	v := int64(f.u)
	if v < math.MinInt32 || v > math.MaxInt32 {
		return 0, malformed(path, "field %s (%d): value %d out of int32 range", name, f.num, v)
	}
	return int32(v), nil
}

func join(path, name string) string {
	if path == "" {
		return name
	}
	return path + "." + name
}

func index(path, name string, i int) string {
	return join(path, name) + "[" + strconv.Itoa(i) + "]"
}

func (d *decoder) model(buf []byte) (*Model, error) {
	m := &Model{}
	nmeta := 0
	var graph []byte
	hasGraph := false
	err := fields("model", buf, func(f field) error {
		var err error
		switch f.num {
		case 1:
			m.IRVersion, err = f.int64v("model", "ir_version")
		case 2:
			m.ProducerName, err = f.str("model", "producer_name")
		case 3:
			m.ProducerVersion, err = f.str("model", "producer_version")
		case 4:
			m.Domain, err = f.str("model", "domain")
		case 5:
			m.ModelVersion, err = f.int64v("model", "model_version")
		case 6:
			m.DocString, err = f.str("model", "doc_string")
		case 7:
			if err = f.want("model", "graph", protowire.BytesType); err == nil {
				// Decode the graph last, after the opsets: a later graph
				// field would merge into the first in protobuf; ONNX files
				// carry one, and the last one wins here.
				graph, hasGraph = f.val, true
			}
		case 8:
			p := index("", "opset_import", len(m.Opsets))
			if err = f.want(p, "opset_import", protowire.BytesType); err == nil {
				var o OpsetImport
				o, err = opset(p, f.val)
				m.Opsets = append(m.Opsets, o)
			}
		case 14:
			p := index("", "metadata_props", nmeta)
			nmeta++
			if err = f.want(p, "metadata_props", protowire.BytesType); err == nil {
				var k, v string
				k, v, err = stringPair(p, f.val)
				if m.Metadata == nil {
					m.Metadata = map[string]string{}
				}
				m.Metadata[k] = v
			}
		}
		return err
	})
	if err != nil {
		return nil, err
	}
	if hasGraph {
		m.Graph, err = d.graph("graph", graph)
		if err != nil {
			return nil, err
		}
	}
	return m, nil
}

func opset(path string, buf []byte) (OpsetImport, error) {
	var o OpsetImport
	err := fields(path, buf, func(f field) error {
		var err error
		switch f.num {
		case 1:
			o.Domain, err = f.str(path, "domain")
		case 2:
			o.Version, err = f.int64v(path, "version")
		}
		return err
	})
	return o, err
}

func stringPair(path string, buf []byte) (k, v string, err error) {
	err = fields(path, buf, func(f field) error {
		var err error
		switch f.num {
		case 1:
			k, err = f.str(path, "key")
		case 2:
			v, err = f.str(path, "value")
		}
		return err
	})
	return k, v, err
}

func (d *decoder) graph(path string, buf []byte) (*Graph, error) {
	g := &Graph{}
	err := fields(path, buf, func(f field) error {
		var err error
		switch f.num {
		case 1:
			p := index(path, "node", len(g.Nodes))
			if err = f.want(p, "node", protowire.BytesType); err != nil {
				return err
			}
			if len(g.Nodes) >= d.lim.MaxNodes {
				return fmt.Errorf("%s: %w", p, &LimitError{Limit: "MaxNodes", Value: int64(len(g.Nodes)) + 1, Max: int64(d.lim.MaxNodes)})
			}
			var n *Node
			n, err = d.node(p, f.val)
			g.Nodes = append(g.Nodes, n)
		case 2:
			g.Name, err = f.str(path, "name")
		case 5:
			p := index(path, "initializer", len(g.Initializers))
			if err = f.want(p, "initializer", protowire.BytesType); err == nil {
				var t *Tensor
				t, err = d.tensor(p, f.val)
				g.Initializers = append(g.Initializers, t)
			}
		case 10:
			g.DocString, err = f.str(path, "doc_string")
		case 11, 12, 13:
			var list *[]*ValueInfo
			var name string
			switch f.num {
			case 11:
				list, name = &g.Inputs, "input"
			case 12:
				list, name = &g.Outputs, "output"
			default:
				list, name = &g.ValueInfo, "value_info"
			}
			p := index(path, name, len(*list))
			if err = f.want(p, name, protowire.BytesType); err == nil {
				var v *ValueInfo
				v, err = d.valueInfo(p, f.val)
				*list = append(*list, v)
			}
		case 15:
			p := path + ".sparse_initializer"
			if err = f.want(p, "sparse_initializer", protowire.BytesType); err == nil {
				err = fmt.Errorf("%s: sparse initializers are not supported: %w", p, ErrUnsupportedEncoding)
			}
		}
		return err
	})
	if err != nil {
		return nil, err
	}
	return g, nil
}

func (d *decoder) node(path string, buf []byte) (*Node, error) {
	n := &Node{}
	var refused error // first subgraph or unsupported attribute
	err := fields(path, buf, func(f field) error {
		var err error
		switch f.num {
		case 1:
			var s string
			s, err = f.str(path, "input")
			n.Inputs = append(n.Inputs, s)
		case 2:
			var s string
			s, err = f.str(path, "output")
			n.Outputs = append(n.Outputs, s)
		case 3:
			n.Name, err = f.str(path, "name")
		case 4:
			n.OpType, err = f.str(path, "op_type")
		case 5:
			p := index(path, "attribute", len(n.Attrs))
			if err = f.want(p, "attribute", protowire.BytesType); err != nil {
				return err
			}
			var a *Attribute
			a, err = d.attribute(p, f.val)
			if err != nil && !errors.Is(err, ErrMalformed) && !errors.Is(err, ErrLimit) {
				// Keep scanning for the node's name and op type, which
				// may come after the attribute, so the error can name them.
				if refused == nil {
					refused = err
				}
				err = nil
			}
			if a != nil {
				n.Attrs = append(n.Attrs, a)
			}
		case 6:
			n.DocString, err = f.str(path, "doc_string")
		case 7:
			n.Domain, err = f.str(path, "domain")
		}
		return err
	})
	if err != nil {
		return nil, err
	}
	if refused != nil && !d.dropRefused {
		return nil, fmt.Errorf("node %q (%s): %w", n.Name, n.OpType, refused)
	}
	return n, nil
}

func (d *decoder) attribute(path string, buf []byte) (*Attribute, error) {
	a := &Attribute{}
	var (
		typeSet                                    bool
		hasF, hasI, hasS, hasT                     bool
		graphKind, sparseKind, typeKind            string
		floats                                     [][]byte // packed fixed32 chunks
		ints                                       [][]byte // packed varint chunks
		strs                                       []string
		tensors                                    []*Tensor
		hasFloats, hasInts, hasStrings, hasTensors bool
	)
	err := fields(path, buf, func(f field) error {
		var err error
		switch f.num {
		case 1:
			a.Name, err = f.str(path, "name")
		case 2:
			if err = f.want(path, "f", protowire.Fixed32Type); err == nil {
				a.F, hasF = math.Float32frombits(uint32(f.u)), true
			}
		case 3:
			a.I, err = f.int64v(path, "i")
			hasI = true
		case 4:
			a.S, err = f.str(path, "s")
			hasS = true
		case 5:
			if err = f.want(path, "t", protowire.BytesType); err == nil {
				a.T, err = d.tensor(path+".t", f.val)
				hasT = true
			}
		case 6:
			err = f.want(path, "g", protowire.BytesType)
			graphKind = "GRAPH"
		case 7:
			floats, err = packedChunk(path, "floats", f, protowire.Fixed32Type, floats)
			hasFloats = true
		case 8:
			ints, err = packedChunk(path, "ints", f, protowire.VarintType, ints)
			hasInts = true
		case 9:
			var s string
			s, err = f.str(path, "strings")
			strs = append(strs, s)
			hasStrings = true
		case 10:
			p := index(path, "tensors", len(tensors))
			if err = f.want(p, "tensors", protowire.BytesType); err == nil {
				var t *Tensor
				t, err = d.tensor(p, f.val)
				tensors = append(tensors, t)
				hasTensors = true
			}
		case 11:
			err = f.want(path, "graphs", protowire.BytesType)
			graphKind = "GRAPHS"
		case 13:
			a.DocString, err = f.str(path, "doc_string")
		case 14:
			err = f.want(path, "tp", protowire.BytesType)
			typeKind = "TYPE_PROTO"
		case 15:
			err = f.want(path, "type_protos", protowire.BytesType)
			typeKind = "TYPE_PROTOS"
		case 20:
			var v int32
			v, err = f.int32v(path, "type")
			a.Type, typeSet = AttrType(v), true
		case 21:
			a.RefAttrName, err = f.str(path, "ref_attr_name")
		case 22:
			err = f.want(path, "sparse_tensor", protowire.BytesType)
			sparseKind = "SPARSE_TENSOR"
		case 23:
			err = f.want(path, "sparse_tensors", protowire.BytesType)
			sparseKind = "SPARSE_TENSORS"
		}
		return err
	})
	if err != nil {
		return nil, err
	}
	switch a.Type {
	case AttrGraph, AttrGraphs:
		graphKind = map[AttrType]string{AttrGraph: "GRAPH", AttrGraphs: "GRAPHS"}[a.Type]
	case AttrSparse, AttrSparses:
		sparseKind = map[AttrType]string{AttrSparse: "SPARSE_TENSOR", AttrSparses: "SPARSE_TENSORS"}[a.Type]
	case AttrTypeProto, AttrTypeProtos:
		typeKind = map[AttrType]string{AttrTypeProto: "TYPE_PROTO", AttrTypeProtos: "TYPE_PROTOS"}[a.Type]
	}
	switch {
	case graphKind != "":
		return nil, fmt.Errorf("%s: attribute %q is %s-valued: %w", path, a.Name, graphKind, ErrSubgraph)
	case sparseKind != "":
		return nil, fmt.Errorf("%s: attribute %q is %s-valued: sparse tensors are not supported: %w", path, a.Name, sparseKind, ErrUnsupportedEncoding)
	case typeKind != "":
		return nil, fmt.Errorf("%s: attribute %q is %s-valued: type attributes are not supported: %w", path, a.Name, typeKind, ErrUnsupportedEncoding)
	}
	if !typeSet || a.Type == AttrUndefined {
		// IR version 1 had no type field: infer it from the value present.
		switch {
		case hasF:
			a.Type = AttrFloat
		case hasI:
			a.Type = AttrInt
		case hasS:
			a.Type = AttrString
		case hasT:
			a.Type = AttrTensor
		case hasFloats:
			a.Type = AttrFloats
		case hasInts:
			a.Type = AttrInts
		case hasStrings:
			a.Type = AttrStrings
		case hasTensors:
			a.Type = AttrTensors
		}
	}
	// Keep exactly the field that matches the type.
	keepF, keepI, keepS, keepT := a.F, a.I, a.S, a.T
	a.F, a.I, a.S, a.T = 0, 0, "", nil
	switch a.Type {
	case AttrFloat:
		a.F = keepF
	case AttrInt:
		a.I = keepI
	case AttrString:
		a.S = keepS
	case AttrTensor:
		if keepT == nil {
			return nil, malformed(path, "TENSOR attribute %q has no tensor", a.Name)
		}
		a.T = keepT
	case AttrFloats:
		n := 0
		for _, c := range floats {
			n += len(c) / 4
		}
		if int64(n) > d.lim.MaxTensorElements {
			return nil, fmt.Errorf("%s: floats: %w", path, &LimitError{Limit: "MaxTensorElements", Value: int64(n), Max: d.lim.MaxTensorElements})
		}
		if n > 0 {
			a.Floats = fixed32Floats(floats, int64(n))
		}
	case AttrInts:
		n := varintCount(ints)
		if n > d.lim.MaxTensorElements {
			return nil, fmt.Errorf("%s: ints: %w", path, &LimitError{Limit: "MaxTensorElements", Value: n, Max: d.lim.MaxTensorElements})
		}
		if n > 0 {
			vals, err := varints(path+".ints", ints, n)
			if err != nil {
				return nil, err
			}
			a.Ints = convert(vals, func(v uint64) int64 { return int64(v) })
		}
	case AttrStrings:
		a.Strings = strs
	case AttrTensors:
		a.Tensors = tensors
	case AttrUndefined:
		if a.RefAttrName == "" {
			return nil, malformed(path, "attribute %q has no type and no value", a.Name)
		}
	default:
		return nil, fmt.Errorf("%s: attribute %q has unknown type %d: %w", path, a.Name, a.Type, ErrUnsupportedEncoding)
	}
	return a, nil
}

// packedChunk appends the value bytes of a repeated scalar field to chunks in
// packed form: a packed field contributes its payload, an unpacked one its
// single encoded value. elem is the unpacked wire type of the field.
func packedChunk(path, name string, f field, elem protowire.Type, chunks [][]byte) ([][]byte, error) {
	switch f.typ {
	case protowire.BytesType:
		switch elem {
		case protowire.Fixed32Type:
			if len(f.val)%4 != 0 {
				return nil, malformed(path, "packed %s: %d bytes is not a multiple of 4", name, len(f.val))
			}
		case protowire.Fixed64Type:
			if len(f.val)%8 != 0 {
				return nil, malformed(path, "packed %s: %d bytes is not a multiple of 8", name, len(f.val))
			}
		case protowire.VarintType:
			if len(f.val) > 0 && f.val[len(f.val)-1]&0x80 != 0 {
				return nil, malformed(path, "packed %s: truncated", name)
			}
		}
		return append(chunks, f.val), nil
	case elem:
		return append(chunks, f.val), nil
	}
	return nil, malformed(path, "field %s (%d): wire type %s, want %s or packed", name, f.num, wireNames[f.typ], wireNames[elem])
}

// varintCount counts the varints in packed chunks without decoding them: one
// per byte with the continuation bit clear. packedChunk has checked that each
// chunk ends a varint; overlong varints are caught when the values are decoded.
func varintCount(chunks [][]byte) int64 {
	var n int64
	for _, c := range chunks {
		for _, b := range c {
			if b&0x80 == 0 {
				n++
			}
		}
	}
	return n
}

func (d *decoder) valueInfo(path string, buf []byte) (*ValueInfo, error) {
	v := &ValueInfo{}
	err := fields(path, buf, func(f field) error {
		var err error
		switch f.num {
		case 1:
			v.Name, err = f.str(path, "name")
		case 2:
			if err = f.want(path, "type", protowire.BytesType); err == nil {
				v.Type, err = d.typeProto(path+".type", f.val, 0)
			}
		case 3:
			v.DocString, err = f.str(path, "doc_string")
		}
		return err
	})
	if err != nil {
		return nil, err
	}
	return v, nil
}

func (d *decoder) typeProto(path string, buf []byte, depth int) (*Type, error) {
	if depth >= maxTypeDepth {
		return nil, fmt.Errorf("%s: type nested deeper than %d levels: %w", path, maxTypeDepth, ErrUnsupportedEncoding)
	}
	t := &Type{}
	err := fields(path, buf, func(f field) error {
		var err error
		// The arms form a oneof: the last one present wins.
		reset := func(k TypeKind) { *t = Type{Kind: k, Denotation: t.Denotation} }
		switch f.num {
		case 1, 8:
			name, kind := "tensor_type", KindTensor
			if f.num == 8 {
				name, kind = "sparse_tensor_type", KindSparseTensor
			}
			p := join(path, name)
			if err = f.want(path, name, protowire.BytesType); err == nil {
				reset(kind)
				err = d.tensorType(p, f.val, t)
			}
		case 4, 9:
			name, kind := "sequence_type", KindSequence
			if f.num == 9 {
				name, kind = "optional_type", KindOptional
			}
			p := join(path, name)
			if err = f.want(path, name, protowire.BytesType); err == nil {
				reset(kind)
				err = fields(p, f.val, func(g field) error {
					if g.num != 1 {
						return nil
					}
					if err := g.want(p, "elem_type", protowire.BytesType); err != nil {
						return err
					}
					var err error
					t.Inner, err = d.typeProto(p+".elem_type", g.val, depth+1)
					return err
				})
			}
		case 5:
			p := join(path, "map_type")
			if err = f.want(path, "map_type", protowire.BytesType); err == nil {
				reset(KindMap)
				err = fields(p, f.val, func(g field) error {
					var err error
					switch g.num {
					case 1:
						var k int32
						k, err = g.int32v(p, "key_type")
						t.Key = DataType(k)
					case 2:
						if err = g.want(p, "value_type", protowire.BytesType); err == nil {
							t.Inner, err = d.typeProto(p+".value_type", g.val, depth+1)
						}
					}
					return err
				})
			}
		case 6:
			t.Denotation, err = f.str(path, "denotation")
		}
		return err
	})
	if err != nil {
		return nil, err
	}
	return t, nil
}

// tensorType decodes TypeProto.Tensor or TypeProto.SparseTensor into t.
func (d *decoder) tensorType(path string, buf []byte, t *Type) error {
	return fields(path, buf, func(f field) error {
		var err error
		switch f.num {
		case 1:
			var e int32
			e, err = f.int32v(path, "elem_type")
			t.Elem = DataType(e)
		case 2:
			p := join(path, "shape")
			if err = f.want(path, "shape", protowire.BytesType); err == nil {
				t.Shape, t.HasShape = nil, true
				err = fields(p, f.val, func(g field) error {
					if g.num != 1 {
						return nil
					}
					q := index(p, "dim", len(t.Shape))
					if err := g.want(q, "dim", protowire.BytesType); err != nil {
						return err
					}
					if len(t.Shape) >= d.lim.MaxRank {
						return fmt.Errorf("%s: %w", q, &LimitError{Limit: "MaxRank", Value: int64(len(t.Shape)) + 1, Max: int64(d.lim.MaxRank)})
					}
					dim, err := dimension(q, g.val)
					t.Shape = append(t.Shape, dim)
					return err
				})
			}
		}
		return err
	})
}

func dimension(path string, buf []byte) (Dim, error) {
	var dim Dim
	err := fields(path, buf, func(f field) error {
		var err error
		switch f.num {
		case 1:
			dim.Value, err = f.int64v(path, "dim_value")
			dim.HasValue, dim.Param = true, ""
		case 2:
			dim.Param, err = f.str(path, "dim_param")
			dim.HasValue, dim.Value = false, 0
		case 3:
			dim.Denotation, err = f.str(path, "denotation")
		}
		return err
	})
	return dim, err
}
