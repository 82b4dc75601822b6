package onnxlite

import (
	"errors"
	"fmt"
	"io"
	"math"
	"sort"

	"google.golang.org/protobuf/encoding/protowire"
)

// Encode writes m to w as a serialized ONNX ModelProto. Tensor data is
// written as little-endian raw_data (STRING tensors as string_data) and
// metadata_props sorted by key, so the output is deterministic; decoding it
// gives back an IR equal to m. A tensor whose Data does not match its DType
// and Dims, or an attribute kind onnxlite does not represent, is an error.
func Encode(w io.Writer, m *Model) (err error) {
	defer recoverTo(&err, "encode", nil)
	if m == nil {
		return errors.New("onnxlite: encode: nil model")
	}
	b, err := appendModel(nil, m)
	return writeEncoded(w, "encode", b, err)
}

// EncodeTensor writes t to w as a serialized TensorProto, in the form of
// the input_*.pb files of the ONNX backend test data.
func EncodeTensor(w io.Writer, t *Tensor) (err error) {
	defer recoverTo(&err, "encode tensor", nil)
	b, err := appendTensor(nil, t)
	return writeEncoded(w, "encode tensor", b, err)
}

// writeEncoded writes the message b to w, unless encoding it failed with
// err; what prefixes either error.
func writeEncoded(w io.Writer, what string, b []byte, err error) error {
	if err == nil {
		_, err = w.Write(b)
	}
	if err != nil {
		return fmt.Errorf("onnxlite: %s: %w", what, err)
	}
	return nil
}

func appendString(b []byte, num protowire.Number, s string) []byte {
	b = protowire.AppendTag(b, num, protowire.BytesType)
	return protowire.AppendString(b, s)
}

func appendStringNonEmpty(b []byte, num protowire.Number, s string) []byte {
	if s == "" {
		return b
	}
	return appendString(b, num, s)
}

func appendVarint(b []byte, num protowire.Number, v uint64) []byte {
	b = protowire.AppendTag(b, num, protowire.VarintType)
	return protowire.AppendVarint(b, v)
}

func appendVarintNonZero(b []byte, num protowire.Number, v int64) []byte {
	if v == 0 {
		return b
	}
	return appendVarint(b, num, uint64(v))
}

func appendBytes(b []byte, num protowire.Number, v []byte) []byte {
	b = protowire.AppendTag(b, num, protowire.BytesType)
	return protowire.AppendBytes(b, v)
}

// appendMessage appends a length-delimited submessage built by fn.
func appendMessage(b []byte, num protowire.Number, fn func([]byte) ([]byte, error)) ([]byte, error) {
	sub, err := fn(nil)
	if err != nil {
		return nil, err
	}
	return appendBytes(b, num, sub), nil
}

func appendModel(b []byte, m *Model) ([]byte, error) {
	var err error
	b = appendVarintNonZero(b, 1, m.IRVersion)
	b = appendStringNonEmpty(b, 2, m.ProducerName)
	b = appendStringNonEmpty(b, 3, m.ProducerVersion)
	b = appendStringNonEmpty(b, 4, m.Domain)
	b = appendVarintNonZero(b, 5, m.ModelVersion)
	b = appendStringNonEmpty(b, 6, m.DocString)
	for _, o := range m.Opsets {
		var sub []byte
		sub = appendStringNonEmpty(sub, 1, o.Domain)
		sub = appendVarint(sub, 2, uint64(o.Version))
		b = appendBytes(b, 8, sub)
	}
	keys := make([]string, 0, len(m.Metadata))
	for k := range m.Metadata {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	for _, k := range keys {
		var sub []byte
		sub = appendString(sub, 1, k)
		sub = appendString(sub, 2, m.Metadata[k])
		b = appendBytes(b, 14, sub)
	}
	if m.Graph != nil {
		b, err = appendMessage(b, 7, func(s []byte) ([]byte, error) { return appendGraph(s, m.Graph) })
		if err != nil {
			return nil, fmt.Errorf("graph: %w", err)
		}
	}
	return b, nil
}

func appendGraph(b []byte, g *Graph) ([]byte, error) {
	var err error
	for i, n := range g.Nodes {
		if n == nil {
			return nil, fmt.Errorf("node[%d] is nil", i)
		}
		b, err = appendMessage(b, 1, func(s []byte) ([]byte, error) { return appendNode(s, n) })
		if err != nil {
			return nil, fmt.Errorf("node[%d] %q (%s): %w", i, n.Name, n.OpType, err)
		}
	}
	b = appendStringNonEmpty(b, 2, g.Name)
	for i, t := range g.Initializers {
		b, err = appendMessage(b, 5, func(s []byte) ([]byte, error) { return appendTensor(s, t) })
		if err != nil {
			return nil, fmt.Errorf("initializer[%d]: %w", i, err)
		}
	}
	b = appendStringNonEmpty(b, 10, g.DocString)
	lists := []struct {
		num  protowire.Number
		name string
		vs   []*ValueInfo
	}{{11, "input", g.Inputs}, {12, "output", g.Outputs}, {13, "value_info", g.ValueInfo}}
	for _, l := range lists {
		for i, v := range l.vs {
			if v == nil {
				return nil, fmt.Errorf("%s[%d] is nil", l.name, i)
			}
			b, err = appendMessage(b, l.num, func(s []byte) ([]byte, error) { return appendValueInfo(s, v) })
			if err != nil {
				return nil, fmt.Errorf("%s[%d] %q: %w", l.name, i, v.Name, err)
			}
		}
	}
	return b, nil
}

func appendNode(b []byte, n *Node) ([]byte, error) {
	var err error
	for _, s := range n.Inputs {
		b = appendString(b, 1, s)
	}
	for _, s := range n.Outputs {
		b = appendString(b, 2, s)
	}
	b = appendStringNonEmpty(b, 3, n.Name)
	b = appendStringNonEmpty(b, 4, n.OpType)
	for i, a := range n.Attrs {
		if a == nil {
			return nil, fmt.Errorf("attribute[%d] is nil", i)
		}
		b, err = appendMessage(b, 5, func(s []byte) ([]byte, error) { return appendAttribute(s, a) })
		if err != nil {
			return nil, fmt.Errorf("attribute[%d] %q: %w", i, a.Name, err)
		}
	}
	b = appendStringNonEmpty(b, 6, n.DocString)
	b = appendStringNonEmpty(b, 7, n.Domain)
	return b, nil
}

func appendAttribute(b []byte, a *Attribute) ([]byte, error) {
	var err error
	b = appendStringNonEmpty(b, 1, a.Name)
	b = appendStringNonEmpty(b, 21, a.RefAttrName)
	b = appendStringNonEmpty(b, 13, a.DocString)
	b = appendVarint(b, 20, uint64(a.Type))
	switch a.Type {
	case AttrUndefined:
		if a.RefAttrName == "" {
			return nil, errors.New("attribute has no type")
		}
	case AttrFloat:
		b = protowire.AppendTag(b, 2, protowire.Fixed32Type)
		b = protowire.AppendFixed32(b, math.Float32bits(a.F))
	case AttrInt:
		b = appendVarint(b, 3, uint64(a.I))
	case AttrString:
		b = appendString(b, 4, a.S)
	case AttrTensor:
		if a.T == nil {
			return nil, errors.New("TENSOR attribute with nil tensor")
		}
		b, err = appendMessage(b, 5, func(s []byte) ([]byte, error) { return appendTensor(s, a.T) })
		if err != nil {
			return nil, err
		}
	case AttrFloats:
		if len(a.Floats) > 0 {
			var p []byte
			for _, f := range a.Floats {
				p = protowire.AppendFixed32(p, math.Float32bits(f))
			}
			b = appendBytes(b, 7, p)
		}
	case AttrInts:
		if len(a.Ints) > 0 {
			var p []byte
			for _, v := range a.Ints {
				p = protowire.AppendVarint(p, uint64(v))
			}
			b = appendBytes(b, 8, p)
		}
	case AttrStrings:
		for _, s := range a.Strings {
			b = appendString(b, 9, s)
		}
	case AttrTensors:
		for i, t := range a.Tensors {
			b, err = appendMessage(b, 10, func(s []byte) ([]byte, error) { return appendTensor(s, t) })
			if err != nil {
				return nil, fmt.Errorf("tensors[%d]: %w", i, err)
			}
		}
	case AttrGraph, AttrGraphs:
		return nil, fmt.Errorf("%v-valued attribute: %w", a.Type, ErrSubgraph)
	default:
		return nil, fmt.Errorf("attribute type %d: %w", a.Type, ErrUnsupportedEncoding)
	}
	return b, nil
}

func appendTensor(b []byte, t *Tensor) ([]byte, error) {
	if err := checkTensor(t); err != nil {
		return nil, err
	}
	for _, d := range t.Dims {
		b = appendVarint(b, 1, uint64(d))
	}
	b = appendVarint(b, 2, uint64(t.DType))
	b = appendStringNonEmpty(b, 8, t.Name)
	b = appendStringNonEmpty(b, 12, t.DocString)
	if t.DType == String {
		for _, s := range t.Data.([][]byte) {
			b = appendBytes(b, 6, s)
		}
		return b, nil
	}
	raw, err := toRaw(t)
	if err != nil {
		return nil, err
	}
	return appendBytes(b, 9, raw), nil
}

func appendValueInfo(b []byte, v *ValueInfo) ([]byte, error) {
	var err error
	b = appendStringNonEmpty(b, 1, v.Name)
	if v.Type != nil {
		b, err = appendMessage(b, 2, func(s []byte) ([]byte, error) { return appendType(s, v.Type, 0) })
		if err != nil {
			return nil, err
		}
	}
	b = appendStringNonEmpty(b, 3, v.DocString)
	return b, nil
}

func appendType(b []byte, t *Type, depth int) ([]byte, error) {
	if depth >= maxTypeDepth {
		return nil, fmt.Errorf("type nested deeper than %d levels: %w", maxTypeDepth, ErrUnsupportedEncoding)
	}
	inner := func(num protowire.Number) func([]byte) ([]byte, error) {
		return func(s []byte) ([]byte, error) {
			if t.Inner == nil {
				return s, nil
			}
			return appendMessage(s, num, func(s2 []byte) ([]byte, error) { return appendType(s2, t.Inner, depth+1) })
		}
	}
	var err error
	switch t.Kind {
	case KindTensor, KindSparseTensor:
		num := protowire.Number(1)
		if t.Kind == KindSparseTensor {
			num = 8
		}
		b, err = appendMessage(b, num, func(s []byte) ([]byte, error) {
			s = appendVarintNonZero(s, 1, int64(t.Elem))
			if t.HasShape {
				var shape []byte
				for _, d := range t.Shape {
					var dim []byte
					if d.HasValue {
						dim = appendVarint(dim, 1, uint64(d.Value))
					} else {
						dim = appendStringNonEmpty(dim, 2, d.Param)
					}
					dim = appendStringNonEmpty(dim, 3, d.Denotation)
					shape = appendBytes(shape, 1, dim)
				}
				s = appendBytes(s, 2, shape)
			}
			return s, nil
		})
	case KindSequence:
		b, err = appendMessage(b, 4, inner(1))
	case KindOptional:
		b, err = appendMessage(b, 9, inner(1))
	case KindMap:
		b, err = appendMessage(b, 5, func(s []byte) ([]byte, error) {
			s = appendVarintNonZero(s, 1, int64(t.Key))
			return inner(2)(s)
		})
	case KindUnknown:
	default:
		return nil, fmt.Errorf("type kind %d: %w", t.Kind, ErrUnsupportedEncoding)
	}
	if err != nil {
		return nil, err
	}
	b = appendStringNonEmpty(b, 6, t.Denotation)
	return b, nil
}
