// Package onnxlite reads, validates and writes ONNX models without cgo.
//
// Decode turns the protobuf bytes of a ModelProto into a Model: a plain Go
// graph IR that keeps every field the rest of apportion needs (opsets,
// metadata, nodes with attributes, initializers, typed inputs and outputs).
// Validate checks the graph, Infer gives every value a static shape and folds
// the constant shape arithmetic that exporters emit (InferWith hands every
// other all-constant node to an engine's Evaluator), and Encode writes a
// Model back as a valid ONNX file. Errors about a model start with
// "invalid model: " when it breaks the ONNX specification (ErrInvalid) and
// "not supported by apportion: " when it asks for what apportion does not
// compute (ErrUnsupported).
package onnxlite

// DataType is an ONNX TensorProto.DataType enum value.
type DataType int32

// The ONNX element types (onnx.proto, TensorProto.DataType).
const (
	Undefined  DataType = 0
	Float      DataType = 1
	Uint8      DataType = 2
	Int8       DataType = 3
	Uint16     DataType = 4
	Int16      DataType = 5
	Int32      DataType = 6
	Int64      DataType = 7
	String     DataType = 8
	Bool       DataType = 9
	Float16    DataType = 10
	Double     DataType = 11
	Uint32     DataType = 12
	Uint64     DataType = 13
	Complex64  DataType = 14
	Complex128 DataType = 15
	BFloat16   DataType = 16
)

// Model is a decoded ONNX ModelProto.
type Model struct {
	IRVersion       int64
	Opsets          []OpsetImport
	ProducerName    string
	ProducerVersion string
	Domain          string
	ModelVersion    int64
	DocString       string
	// Metadata holds metadata_props. The CLI reads feature names, units and
	// class names from it.
	Metadata map[string]string
	Graph    *Graph
}

// OpsetImport names an operator set and its version. The default ONNX
// domain is the empty string (also written "ai.onnx").
type OpsetImport struct {
	Domain  string
	Version int64
}

// Graph is a decoded GraphProto.
type Graph struct {
	Name         string
	DocString    string
	Nodes        []*Node
	Initializers []*Tensor
	Inputs       []*ValueInfo
	Outputs      []*ValueInfo
	ValueInfo    []*ValueInfo
}

// Node is one operator application.
type Node struct {
	Name      string
	OpType    string
	Domain    string
	Inputs    []string // an empty string marks an omitted optional input
	Outputs   []string
	Attrs     []*Attribute
	DocString string
}

// AttrType is an ONNX AttributeProto.AttributeType enum value.
type AttrType int32

// The attribute kinds onnxlite keeps. Graph-valued attributes are refused at
// decode time with ErrSubgraph.
const (
	AttrUndefined  AttrType = 0
	AttrFloat      AttrType = 1
	AttrInt        AttrType = 2
	AttrString     AttrType = 3
	AttrTensor     AttrType = 4
	AttrGraph      AttrType = 5
	AttrFloats     AttrType = 6
	AttrInts       AttrType = 7
	AttrStrings    AttrType = 8
	AttrTensors    AttrType = 9
	AttrGraphs     AttrType = 10
	AttrSparse     AttrType = 11
	AttrSparses    AttrType = 12
	AttrTypeProto  AttrType = 13
	AttrTypeProtos AttrType = 14
)

// Attribute is a named node attribute. Exactly the field matching Type is set.
type Attribute struct {
	Name    string
	Type    AttrType
	F       float32
	I       int64
	S       string
	T       *Tensor
	Floats  []float32
	Ints    []int64
	Strings []string
	Tensors []*Tensor
	// RefAttrName is set when the attribute refers to an attribute of an
	// enclosing function.
	RefAttrName string
	DocString   string
}

// ValueInfo names a value and its type.
type ValueInfo struct {
	Name      string
	Type      *Type // nil when the proto carries no type
	DocString string
}

// TypeKind says which arm of an ONNX TypeProto is set.
type TypeKind int

// The TypeProto arms.
const (
	KindUnknown TypeKind = iota
	KindTensor
	KindSequence
	KindMap
	KindOptional
	KindSparseTensor
)

// Type is a decoded TypeProto.
type Type struct {
	Kind TypeKind
	// Elem is the element type of a tensor or sparse tensor.
	Elem DataType
	// Shape is the tensor shape; nil with HasShape false when the rank is unknown.
	Shape    []Dim
	HasShape bool
	// Inner is the element type of a sequence or optional, the value type of a map.
	Inner *Type
	// Key is the key type of a map.
	Key        DataType
	Denotation string
}

// Dim is one dimension of a tensor shape: a fixed size, a symbolic name
// (dim_param) or neither (unknown).
type Dim struct {
	Value      int64 // valid when HasValue
	HasValue   bool
	Param      string // symbolic name, e.g. "batch"
	Denotation string
}

// Tensor is a decoded TensorProto. Data holds the elements row-major in the
// Go slice type that matches DType:
//
//	Float []float32, Double []float64, Float16 []float16.Float16,
//	BFloat16 []BFloat16Bits, Int8 []int8, Uint8 []uint8, Int16 []int16,
//	Uint16 []uint16, Int32 []int32, Uint32 []uint32, Int64 []int64,
//	Uint64 []uint64, Bool []bool, String [][]byte, Complex64 []complex64,
//	Complex128 []complex128.
//
// Data of external tensors is loaded at decode time; Encode always writes it inline.
type Tensor struct {
	Name      string
	DType     DataType
	Dims      []int64
	Data      any
	DocString string
}

// BFloat16Bits is the bit pattern of a bfloat16 value: the upper 16 bits of
// an IEEE 754 binary32.
type BFloat16Bits uint16

// Attr returns the attribute called name, or nil.
func (n *Node) Attr(name string) *Attribute {
	for _, a := range n.Attrs {
		if a.Name == name {
			return a
		}
	}
	return nil
}

// AttrInt returns the integer attribute name, or def when it is absent.
func (n *Node) AttrInt(name string, def int64) int64 {
	if a := n.Attr(name); a != nil && a.Type == AttrInt {
		return a.I
	}
	return def
}

// AttrFloat returns the float attribute name, or def when it is absent.
func (n *Node) AttrFloat(name string, def float32) float32 {
	if a := n.Attr(name); a != nil && a.Type == AttrFloat {
		return a.F
	}
	return def
}

// AttrString returns the string attribute name, or def when it is absent.
func (n *Node) AttrString(name, def string) string {
	if a := n.Attr(name); a != nil && a.Type == AttrString {
		return a.S
	}
	return def
}

// AttrInts returns the integer-list attribute name, or def when it is absent.
func (n *Node) AttrInts(name string, def []int64) []int64 {
	if a := n.Attr(name); a != nil && a.Type == AttrInts {
		return a.Ints
	}
	return def
}

// AttrFloats returns the float-list attribute name, or def when it is absent.
func (n *Node) AttrFloats(name string, def []float32) []float32 {
	if a := n.Attr(name); a != nil && a.Type == AttrFloats {
		return a.Floats
	}
	return def
}

// OpsetVersion returns the imported version of domain ("" and "ai.onnx" are
// the same default domain), or 0 when it is not imported.
func (m *Model) OpsetVersion(domain string) int64 {
	if domain == "ai.onnx" {
		domain = ""
	}
	for _, o := range m.Opsets {
		d := o.Domain
		if d == "ai.onnx" {
			d = ""
		}
		if d == domain {
			return o.Version
		}
	}
	return 0
}
