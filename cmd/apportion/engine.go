package main

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"path/filepath"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// decodeModel reads an ONNX model file.
func decodeModel(path string) (*onnxlite.Model, error) {
	_, m, err := readModelFile(path)
	return m, err
}

// readModelFile reads and decodes an ONNX model file, returning its bytes too.
func readModelFile(path string) ([]byte, *onnxlite.Model, error) {
	st, err := os.Stat(path)
	if err != nil {
		return nil, nil, fmt.Errorf("reading model: %w", err)
	}
	if st.Size() > onnxlite.DefaultLimits.MaxModelBytes {
		return nil, nil, fmt.Errorf("reading model %s: file is %d bytes, more than the %d bytes a model may have", path, st.Size(), onnxlite.DefaultLimits.MaxModelBytes)
	}
	raw, err := os.ReadFile(path)
	if err != nil {
		return nil, nil, fmt.Errorf("reading model: %w", err)
	}
	m, err := decodeModelBytes(raw, path, filepath.Dir(path))
	return raw, m, err
}

// decodeModelBytes decodes the model bytes raw; name is used in messages,
// and external tensor data is read from baseDir (refused when empty).
func decodeModelBytes(raw []byte, name, baseDir string) (*onnxlite.Model, error) {
	m, err := onnxlite.Decode(bytes.NewReader(raw), onnxlite.DecodeOptions{BaseDir: baseDir})
	if err != nil {
		return nil, fmt.Errorf("reading model %s: %w", name, err)
	}
	if m.Graph == nil {
		return nil, fmt.Errorf("reading model %s: the model has no graph", name)
	}
	return m, nil
}

// unsupportedOp is an operator node the compiler cannot run.
type unsupportedOp struct {
	Op     string `json:"op"`
	Node   string `json:"node"`
	Domain string `json:"-"`
}

func unsupportedOps(m *onnxlite.Model) []unsupportedOp {
	var ops []unsupportedOp
	for _, u := range onnxlite.Unsupported(m) {
		ops = append(ops, unsupportedOp{Op: u.Op, Node: u.Node, Domain: u.Domain})
	}
	return ops
}

// network is a compiled model.
type network struct {
	nw *nn.Network
}

// compileModel compiles m; shapes gives per-sample input shapes for inputs
// whose declared shape leaves non-batch dimensions open (nil for none), and
// parallel how many goroutines one call may split a large batch across
// (nn.Options.Parallel): the one-shot commands use every core, the server 1,
// since its concurrency comes from requests.
func compileModel(m *onnxlite.Model, shapes map[string][]int, parallel int) (*network, error) {
	nw, err := nn.Compile(m, nn.Options{InputShapes: shapes, Parallel: parallel})
	if err != nil {
		return nil, fmt.Errorf("compiling model: %w", err)
	}
	return &network{nw: nw}, nil
}

func (n *network) forward(ctx context.Context, in []*onnxlite.Tensor) ([]*onnxlite.Tensor, error) {
	out, err := n.nw.Forward(ctx, in)
	if err != nil {
		return nil, fmt.Errorf("running model: %w", err)
	}
	return out, nil
}

// head is output as a function of the network's single runtime input, or
// of the logits before its final Softmax with logits set.
func (n *network) head(output string, logits bool) (gradattr.Model, error) {
	h, err := n.nw.Head(nn.Selection{Output: output, Logits: logits})
	if err != nil {
		return nil, fmt.Errorf("selecting output %q: %w", output, err)
	}
	return h, nil
}
