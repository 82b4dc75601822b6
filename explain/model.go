// Package explain is the orchestration the command line, the HTTP API and
// pipelines share: a loaded model and the settings of an explanation in,
// results and the stable explain JSON document out; predictions and the
// predict document; the model's description; and many rows explained
// concurrently into a gradattr.Summary whose record merges with any other
// written with the same settings.
//
// The steps: Decode (or ReadModel) reads a model, Model.Compile builds its
// network, Model.Head selects the output to explain, New joins it with the
// Settings, and Explainer.Explain explains a batch of samples into a
// Report, whose WriteJSON writes the document. Explainer.Attribute
// explains one row, for callers that bring their own rows (a pipeline).
package explain

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/modelmeta"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// Model is a decoded ONNX model, its names and, once compiled, its
// network. After Compile it is safe for concurrent use.
type Model struct {
	// Name names the model in documents: its path, "demo:pumps.onnx".
	Name string
	// SHA256 is the hex SHA-256 of the model's bytes.
	SHA256 string
	// Graph is the decoded model.
	Graph *onnxlite.Model
	// Meta holds the names of its features and classes.
	Meta modelmeta.Meta
	// InputName names the runtime input explanations attribute to; empty
	// means the first floating-point input. A model with other runtime
	// inputs holds them at each sample's values (Explainer.Hold).
	InputName string

	net *nn.Network
}

// DecodeOptions tune Decode.
type DecodeOptions struct {
	// BaseDir is the directory external tensor data is read from; empty
	// refuses external data.
	BaseDir string
}

// Decode reads the model bytes raw, called name in messages and documents.
func Decode(raw []byte, name string, opt DecodeOptions) (*Model, error) {
	if len(raw) == 0 {
		return nil, fmt.Errorf("reading model %s: empty file: expected an ONNX model", name)
	}
	var g *onnxlite.Model
	err := guard(func() (err error) {
		g, err = onnxlite.Decode(bytes.NewReader(raw), onnxlite.DecodeOptions{BaseDir: opt.BaseDir})
		return err
	})
	if err != nil {
		return nil, fmt.Errorf("reading model %s: %w", name, err)
	}
	if g.Graph == nil {
		return nil, fmt.Errorf("reading model %s: the model has no graph", name)
	}
	sum := sha256.Sum256(raw)
	return &Model{Name: name, SHA256: hex.EncodeToString(sum[:]), Graph: g, Meta: modelmeta.Read(g)}, nil
}

// ReadModel reads the model file at path (external data from its
// directory), refusing a file larger than onnxlite's limit.
func ReadModel(path string) (*Model, error) {
	st, err := os.Stat(path)
	if err != nil {
		return nil, fmt.Errorf("reading model: %w", err)
	}
	if limit := onnxlite.DefaultLimits.MaxModelBytes; st.Size() > limit {
		return nil, fmt.Errorf("reading model %s: file is %d bytes, more than the %d bytes a model may have", path, st.Size(), limit)
	}
	raw, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("reading model: %w", err)
	}
	return Decode(raw, path, DecodeOptions{BaseDir: filepath.Dir(path)})
}

// Inputs returns the graph inputs a caller binds (those not backed by an
// initializer), in graph order.
func (m *Model) Inputs() []*onnxlite.ValueInfo {
	g := m.Graph.Graph
	inits := make(map[string]bool, len(g.Initializers))
	for _, t := range g.Initializers {
		inits[t.Name] = true
	}
	var out []*onnxlite.ValueInfo
	for _, vi := range g.Inputs {
		if !inits[vi.Name] {
			out = append(out, vi)
		}
	}
	return out
}

// CompileTimeInput reports whether the graph input called name is a
// parameter of the graph (a target shape, axes, sizes) rather than data:
// its value is fixed when a program is compiled, the same for every
// sample.
func (m *Model) CompileTimeInput(name string) bool {
	return onnxlite.InputUses(m.Graph)[name].CompileTime()
}

// Input returns the spec of the runtime input an explanation attributes
// to: the one InputName names, or the first floating-point input the model
// computes with (not one it reads only as a parameter, such as Resize's
// scales).
func (m *Model) Input() (samples.Spec, error) {
	feeds := m.Inputs()
	uses := onnxlite.InputUses(m.Graph)
	names := make([]string, len(feeds))
	for i, f := range feeds {
		names[i] = f.Name
		data := !uses[f.Name].CompileTime() && !uses[f.Name].Unread
		if m.InputName == "" && data && f.Type != nil && f.Type.Kind == onnxlite.KindTensor && floating(f.Type.Elem) ||
			m.InputName != "" && f.Name == m.InputName {
			return samples.SpecOf(f), nil
		}
	}
	if m.InputName != "" {
		return samples.Spec{}, fmt.Errorf("the model has no input %q (inputs: %s)", m.InputName, strings.Join(names, ", "))
	}
	if t, ok := m.Tokens(); ok {
		for _, f := range feeds {
			if f.Name == t.Input {
				return samples.SpecOf(f), nil
			}
		}
	}
	return samples.Spec{}, fmt.Errorf("the model has no floating-point input to attribute to (inputs: %s): token ids and other integers have no gradient", strings.Join(names, ", "))
}

// floating reports whether dt is a floating-point element type.
func floating(dt onnxlite.DataType) bool {
	return dt == onnxlite.Float || dt == onnxlite.Double || dt == onnxlite.Float16 || dt == onnxlite.BFloat16
}

// Output returns the name of the output called name, the first output
// for "". An unknown name is a *FieldError.
func (m *Model) Output(name string) (string, error) {
	outs := m.Graph.Graph.Outputs
	if len(outs) == 0 {
		return "", fmt.Errorf("the model has no outputs")
	}
	if name == "" {
		return outs[0].Name, nil
	}
	names := make([]string, len(outs))
	for i, o := range outs {
		if o.Name == name {
			return name, nil
		}
		names[i] = o.Name
	}
	return "", fieldError(FieldOutput, fmt.Sprintf(" %q is not an output of the model (outputs: %s)", name, strings.Join(names, ", ")))
}

// ReadOptions are the options samples for this model are read with: CSV
// columns by the model's feature names, bad samples kept with keepBad.
func (m *Model) ReadOptions(keepBad bool) samples.Options {
	return samples.Options{KeepBad: keepBad, Features: m.Meta.Features, Vocabulary: m.Vocabulary()}
}

// CompileOptions tune Compile. The zero value compiles for the float32
// engine.
type CompileOptions struct {
	// InputShapes gives the per-sample shape of each input whose declared
	// shape leaves a dimension after the batch open (see OpenShapes).
	InputShapes map[string][]int
	// Parallel is how many goroutines one call may split a large batch
	// across (nn.Options.Parallel): one-shot runs use every core, servers
	// 1, since their concurrency comes from requests.
	Parallel int
	// DType is the element type the engine computes in: nn.Float32 (the
	// default), or nn.Float64 for values beyond the float32 range and
	// reference-grade results (see ParsePrecision).
	DType nn.DType
	// MaxValueBytes bounds the bytes of the values of one compiled
	// program (nn.Options.MaxValueBytes); 0 means nn.DefaultMaxValueBytes.
	MaxValueBytes int64
}

// ParsePrecision reads the name of an engine precision: float32 (also
// for ""), or float64.
func ParsePrecision(s string) (nn.DType, error) {
	switch s {
	case "float32", "":
		return nn.Float32, nil
	case "float64":
		return nn.Float64, nil
	}
	return 0, fmt.Errorf("precision %q: expected float32 or float64", s)
}

// Compile builds the model's network.
func (m *Model) Compile(opt CompileOptions) error {
	var nw *nn.Network
	err := guard(func() (err error) {
		nw, err = nn.Compile(m.Graph, nn.Options{InputShapes: opt.InputShapes, Parallel: opt.Parallel, DType: opt.DType, MaxValueBytes: opt.MaxValueBytes})
		return err
	})
	if err != nil {
		return fmt.Errorf("compiling model: %w", err)
	}
	m.net = nw
	return nil
}

// OpenShapes gives the per-sample shape of b for Compile when the declared
// shape of spec leaves a dimension after the batch open; nil otherwise.
func OpenShapes(spec samples.Spec, b *samples.Batch) map[string][]int {
	if _, ok := spec.FixedSample(); ok {
		return nil
	}
	return map[string][]int{spec.Name: append([]int(nil), b.SampleShape()...)}
}

func (m *Model) network() (*nn.Network, error) {
	if m.net == nil {
		return nil, fmt.Errorf("explain: model %s is not compiled", m.Name)
	}
	return m.net, nil
}

// squashing are the operators whose input -logits explains.
var squashing = map[string]bool{"Softmax": true, "LogSoftmax": true, "Sigmoid": true}

// producer returns the operator of the node that computes the graph output
// called output, "" when no node does (a graph input or a constant).
func (m *Model) producer(output string) string {
	for _, n := range m.Graph.Graph.Nodes {
		for _, o := range n.Outputs {
			if o == output {
				return n.OpType
			}
		}
	}
	return ""
}

// Head returns the output called output (the first for "") as a function
// of the model's runtime input (of a token model, one that runs the model
// on token ids but has no gradient: see Tokens), or with logits the input of its final
// Softmax, LogSoftmax or Sigmoid. An output without one refuses logits
// with a *FieldError.
func (m *Model) Head(output string, logits bool) (gradattr.Model, error) {
	nw, err := m.network()
	if err != nil {
		return nil, err
	}
	spec, err := m.Input()
	if err != nil {
		return nil, err
	}
	if logits {
		name, err := m.Output(output)
		if err != nil {
			return nil, err
		}
		if op := m.producer(name); !squashing[op] {
			if op == "" {
				op = "no node (it is a graph input or a constant)"
			}
			return nil, fieldError(FieldLogits, fmt.Sprintf(" explains the input of a final Softmax, LogSoftmax or Sigmoid, and output %q comes from %s", name, op))
		}
	}
	if t, ok := m.Tokens(); ok && t.Input == spec.Name {
		l, err := m.layer(t.Embedding, output, logits)
		if err != nil {
			return nil, err
		}
		return tokenHead{l}, nil
	}
	var h *nn.Head
	err = guard(func() (err error) {
		h, err = nw.Head(nn.Selection{Output: output, Logits: logits, Input: spec.Name})
		return err
	})
	if err != nil {
		return nil, fmt.Errorf("selecting output %q: %w", output, err)
	}
	return h, nil
}

// Prediction is the outputs of one run of the model: the predict document,
// {"outputs": [{"name", "shape", "data"}]}.
type Prediction struct {
	Outputs []Output `json:"outputs"`
	// Rows and Errors are present when some samples of the input could
	// not be read: Rows are the indices (from 0) of the samples the
	// outputs are of, in order; Errors the others, each with why.
	Rows   []int      `json:"rows,omitempty"`
	Errors []RowError `json:"errors,omitempty"`
}

// RowError is a sample that could not be read or run.
type RowError struct {
	Index int    `json:"index"`
	Error string `json:"error"`
}

// Output is one output tensor of a Prediction.
type Output struct {
	// Name is the graph output's name.
	Name string `json:"name"`
	// Shape is the tensor's shape.
	Shape []int `json:"shape"`
	// Data holds the values row-major, at the precision they were
	// computed in (see Numbers).
	Data Numbers `json:"data"`
}

// Predict runs the model on one tensor per runtime input, in graph order.
func (m *Model) Predict(ctx context.Context, inputs []*onnxlite.Tensor) (*Prediction, error) {
	nw, err := m.network()
	if err != nil {
		return nil, err
	}
	var outs []*onnxlite.Tensor
	err = guard(func() (err error) {
		outs, err = nw.Forward(ctx, inputs)
		return err
	})
	if err != nil {
		if err := UserError(err); errors.Is(err, nn.ErrBadRequest) {
			return nil, err
		}
		return nil, fmt.Errorf("running model: %w", err)
	}
	p := &Prediction{Outputs: make([]Output, len(outs))}
	for i, t := range outs {
		vals, err := t.Float64s()
		if err != nil {
			return nil, fmt.Errorf("output %q: %w", t.Name, err)
		}
		bits := 64
		if t.DType == onnxlite.Float || t.DType == onnxlite.Float16 || t.DType == onnxlite.BFloat16 {
			bits = 32
		}
		name := t.Name
		if i < len(m.Graph.Graph.Outputs) {
			name = m.Graph.Graph.Outputs[i].Name
		}
		p.Outputs[i] = Output{Name: name, Shape: t.Shape(), Data: Numbers{Values: vals, Bits: bits}}
		if p.Outputs[i].Shape == nil {
			p.Outputs[i].Shape = []int{}
		}
	}
	return p, nil
}
