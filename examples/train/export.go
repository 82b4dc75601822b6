package main

import (
	"bytes"
	"fmt"

	"github.com/apportion/apportion/modelmeta"
	"github.com/apportion/apportion/onnxlite"
)

// Export settings shared by both demo models.
const (
	irVersion    = 8
	opsetVersion = 13
	producerName = "apportion-train"
	producerVer  = "1"
)

// The invented one-sentence descriptions stored in the models' metadata.
const (
	pumpsDescription = "Invented condition monitoring of centrifugal pumps: eight sensor readings classed normal, degraded or failing."
	weldsDescription = "Invented visual inspection of weld seams: a 32×32 grey patch classed clean or defective (crack or porosity)."
)

// graphBuilder collects the nodes and float32 initializers of one graph.
type graphBuilder struct {
	g   *onnxlite.Graph
	err error
}

// init adds a float32 initializer called name with the given dims.
func (b *graphBuilder) init(name string, dims []int64, data []float64) string {
	if b.err != nil {
		return name
	}
	f := make([]float32, len(data))
	for i, v := range data {
		f[i] = float32(v)
	}
	t, err := onnxlite.NewTensor(name, onnxlite.Float, dims, f)
	if err != nil {
		b.err = fmt.Errorf("initializer %q: %w", name, err)
		return name
	}
	b.g.Initializers = append(b.g.Initializers, t)
	return name
}

// node appends one node with a single output called out.
func (b *graphBuilder) node(op, out string, inputs []string, attrs ...*onnxlite.Attribute) string {
	b.g.Nodes = append(b.g.Nodes, &onnxlite.Node{
		Name: out, OpType: op, Inputs: inputs, Outputs: []string{out}, Attrs: attrs,
	})
	return out
}

// ints is an integer-list attribute.
func ints(name string, v ...int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInts, Ints: v}
}

// intAttr is an integer attribute.
func intAttr(name string, v int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInt, I: v}
}

// batchTensor is a float tensor type [batch, dims...] with a symbolic batch.
func batchTensor(name string, dims ...int64) *onnxlite.ValueInfo {
	shape := []onnxlite.Dim{{Param: "batch"}}
	for _, d := range dims {
		shape = append(shape, onnxlite.Dim{Value: d, HasValue: true})
	}
	return &onnxlite.ValueInfo{Name: name, Type: &onnxlite.Type{
		Kind: onnxlite.KindTensor, Elem: onnxlite.Float, Shape: shape, HasShape: true,
	}}
}

// newModel wraps a graph with the demo models' header fields.
func newModel(g *onnxlite.Graph, meta map[string]string, doc string) *onnxlite.Model {
	return &onnxlite.Model{
		IRVersion:       irVersion,
		Opsets:          []onnxlite.OpsetImport{{Domain: "", Version: opsetVersion}},
		ProducerName:    producerName,
		ProducerVersion: producerVer,
		DocString:       doc,
		Metadata:        meta,
		Graph:           g,
	}
}

// pumpsModel is the ONNX graph of m: sensors → Sub(mean) → Div(std) →
// Gemm → Relu → Gemm → Relu → Gemm → Softmax → condition.
func pumpsModel(m *mlp) (*onnxlite.Model, error) {
	b := &graphBuilder{g: &onnxlite.Graph{
		Name:    "pumps",
		Inputs:  []*onnxlite.ValueInfo{batchTensor("sensors", 8)},
		Outputs: []*onnxlite.ValueInfo{batchTensor("condition", 3)},
	}}
	h := b.node("Sub", "centred", []string{"sensors", b.init("feature_mean", []int64{8}, m.Mean)})
	h = b.node("Div", "standardised", []string{h, b.init("feature_std", []int64{8}, m.Std)})
	for l, L := range m.Layers {
		w := b.init(fmt.Sprintf("dense%d.weight", l+1), []int64{int64(L.In), int64(L.Out)}, L.W)
		c := b.init(fmt.Sprintf("dense%d.bias", l+1), []int64{int64(L.Out)}, L.B)
		h = b.node("Gemm", fmt.Sprintf("dense%d", l+1), []string{h, w, c})
		if l+1 < len(m.Layers) {
			h = b.node("Relu", fmt.Sprintf("relu%d", l+1), []string{h})
		}
	}
	b.node("Softmax", "condition", []string{h}, intAttr("axis", 1))
	if b.err != nil {
		return nil, fmt.Errorf("pumps model: %w", b.err)
	}
	names := make([]string, len(pumpFeatures))
	units := make([]string, len(pumpFeatures))
	for i, f := range pumpFeatures {
		names[i], units[i] = f.Name, f.Unit
	}
	model := newModel(b.g, map[string]string{"scenario": "pumps", "description": pumpsDescription}, pumpsDescription)
	if err := modelmeta.Write(model, modelmeta.Meta{Features: names, Units: units, Classes: pumpClasses}); err != nil {
		return nil, fmt.Errorf("pumps model: %w", err)
	}
	return model, nil
}

// weldsModel is the ONNX graph of m: patch → Conv → Relu → MaxPool → Conv →
// Relu → MaxPool → Flatten → Gemm → Relu → Gemm → Softmax → verdict.
func weldsModel(m *cnn) (*onnxlite.Model, error) {
	b := &graphBuilder{g: &onnxlite.Graph{
		Name:    "welds",
		Inputs:  []*onnxlite.ValueInfo{batchTensor("patch", 1, weldSize, weldSize)},
		Outputs: []*onnxlite.ValueInfo{batchTensor("verdict", 2)},
	}}
	h := "patch"
	for i, c := range []conv{m.Conv1, m.Conv2} {
		n := i + 1
		w := b.init(fmt.Sprintf("conv%d.weight", n), []int64{int64(c.Out), int64(c.In), 3, 3}, c.W)
		bias := b.init(fmt.Sprintf("conv%d.bias", n), []int64{int64(c.Out)}, c.B)
		h = b.node("Conv", fmt.Sprintf("conv%d", n), []string{h, w, bias},
			ints("kernel_shape", 3, 3), ints("pads", 1, 1, 1, 1), ints("strides", 1, 1), ints("dilations", 1, 1), intAttr("group", 1))
		h = b.node("Relu", fmt.Sprintf("conv%d.relu", n), []string{h})
		h = b.node("MaxPool", fmt.Sprintf("pool%d", n), []string{h},
			ints("kernel_shape", 2, 2), ints("strides", 2, 2), ints("pads", 0, 0, 0, 0))
	}
	h = b.node("Flatten", "flat", []string{h}, intAttr("axis", 1))
	for i, d := range []dense{m.FC1, m.FC2} {
		n := i + 1
		w := b.init(fmt.Sprintf("dense%d.weight", n), []int64{int64(d.In), int64(d.Out)}, d.W)
		c := b.init(fmt.Sprintf("dense%d.bias", n), []int64{int64(d.Out)}, d.B)
		h = b.node("Gemm", fmt.Sprintf("dense%d", n), []string{h, w, c})
		if n == 1 {
			h = b.node("Relu", "dense1.relu", []string{h})
		}
	}
	b.node("Softmax", "verdict", []string{h}, intAttr("axis", 1))
	if b.err != nil {
		return nil, fmt.Errorf("welds model: %w", b.err)
	}
	model := newModel(b.g, map[string]string{"scenario": "welds", "description": weldsDescription}, weldsDescription)
	if err := modelmeta.Write(model, modelmeta.Meta{Classes: weldClasses}); err != nil {
		return nil, fmt.Errorf("welds model: %w", err)
	}
	return model, nil
}

// encodeModel writes m as ONNX bytes and checks that they decode and
// validate again.
func encodeModel(m *onnxlite.Model) ([]byte, error) {
	var buf bytes.Buffer
	if err := onnxlite.Encode(&buf, m); err != nil {
		return nil, err
	}
	back, err := onnxlite.Decode(bytes.NewReader(buf.Bytes()), onnxlite.DecodeOptions{})
	if err != nil {
		return nil, fmt.Errorf("decoding the encoded model: %w", err)
	}
	if err := back.Validate(); err != nil {
		return nil, fmt.Errorf("validating the encoded model: %w", err)
	}
	return buf.Bytes(), nil
}

// ticketsDescription is the tickets model's invented description.
const ticketsDescription = "Invented triage of pump technicians' maintenance notes: a note of up to 16 words classed urgent, routine or informational."

// ticketsModel is the ONNX graph of m: note (int64 token ids) → Gather
// (embedding) → Transpose → Conv (kernel 3, pads 1) → Relu → ReduceMean
// over the positions → Gemm → Softmax → triage.
func ticketsModel(m *textCNN, vocab []string) (*onnxlite.Model, error) {
	in := batchTensor("note", ticketLen)
	in.Type.Elem = onnxlite.Int64
	b := &graphBuilder{g: &onnxlite.Graph{
		Name:    "tickets",
		Inputs:  []*onnxlite.ValueInfo{in},
		Outputs: []*onnxlite.ValueInfo{batchTensor("triage", int64(len(ticketClasses)))},
	}}
	emb := b.init("embedding.weight", []int64{int64(m.Vocab), int64(m.Embed)}, m.Emb)
	h := b.node("Gather", "embedded", []string{emb, "note"}, intAttr("axis", 0))
	h = b.node("Transpose", "channels", []string{h}, ints("perm", 0, 2, 1))
	w := b.init("conv.weight", []int64{int64(m.Channels), int64(m.Embed), 3}, m.Conv)
	c := b.init("conv.bias", []int64{int64(m.Channels)}, m.ConvB)
	h = b.node("Conv", "conv", []string{h, w, c}, ints("kernel_shape", 3), ints("pads", 1, 1), ints("strides", 1), ints("dilations", 1), intAttr("group", 1))
	h = b.node("Relu", "conv.relu", []string{h})
	h = b.node("ReduceMean", "pooled", []string{h}, ints("axes", 2), intAttr("keepdims", 0))
	fw := b.init("dense.weight", []int64{int64(m.FC.In), int64(m.FC.Out)}, m.FC.W)
	fb := b.init("dense.bias", []int64{int64(m.FC.Out)}, m.FC.B)
	h = b.node("Gemm", "dense", []string{h, fw, fb})
	b.node("Softmax", "triage", []string{h}, intAttr("axis", 1))
	if b.err != nil {
		return nil, fmt.Errorf("tickets model: %w", b.err)
	}
	model := newModel(b.g, map[string]string{"scenario": "tickets", "description": ticketsDescription}, ticketsDescription)
	if err := modelmeta.Write(model, modelmeta.Meta{Classes: ticketClasses, Vocabulary: vocab}); err != nil {
		return nil, fmt.Errorf("tickets model: %w", err)
	}
	return model, nil
}
