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

// This file holds every call into onnxlite and nn, each behind a recover so
// that a panic in a dependency becomes an error message, not a crash.

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
func decodeModelBytes(raw []byte, name, baseDir string) (m *onnxlite.Model, err error) {
	err = safeCall(func() error {
		var e error
		m, e = onnxlite.Decode(bytes.NewReader(raw), onnxlite.DecodeOptions{BaseDir: baseDir})
		return e
	})
	if err != nil {
		return nil, fmt.Errorf("reading model %s: %w", name, err)
	}
	if m.Graph == nil {
		return nil, fmt.Errorf("reading model %s: the model has no graph", name)
	}
	return m, nil
}

// decodeTensor decodes a serialized ONNX TensorProto.
func decodeTensor(raw []byte) (t *onnxlite.Tensor, err error) {
	err = safeCall(func() error {
		var e error
		t, e = onnxlite.DecodeTensor(bytes.NewReader(raw), onnxlite.DecodeOptions{})
		return e
	})
	if err != nil {
		return nil, fmt.Errorf("reading ONNX tensor: %w", err)
	}
	return t, nil
}

// unsupportedOp is an operator node the compiler cannot run.
type unsupportedOp struct {
	Op     string `json:"op"`
	Node   string `json:"node"`
	Domain string `json:"-"`
}

func unsupportedOps(m *onnxlite.Model) (ops []unsupportedOp, err error) {
	err = safeCall(func() error {
		for _, u := range nn.Unsupported(m) {
			ops = append(ops, unsupportedOp{Op: u.Op, Node: u.Node, Domain: u.Domain})
		}
		return nil
	})
	return ops, err
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
func compileModel(m *onnxlite.Model, shapes map[string][]int, parallel int) (net *network, err error) {
	err = safeCall(func() error {
		nw, e := nn.Compile(m, nn.Options{InputShapes: shapes, Parallel: parallel})
		if e != nil {
			return e
		}
		net = &network{nw: nw}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("compiling model: %w", err)
	}
	return net, nil
}

func (n *network) forward(ctx context.Context, in []*onnxlite.Tensor) (out []*onnxlite.Tensor, err error) {
	err = safeCall(func() error {
		var e error
		out, e = n.nw.Forward(ctx, in)
		return e
	})
	if err != nil {
		return nil, fmt.Errorf("running model: %w", err)
	}
	return out, nil
}

// head is output as a function of the network's single runtime input, or
// of the logits before its final Softmax with logits set.
func (n *network) head(output string, logits bool) (m gradattr.Model, err error) {
	err = safeCall(func() error {
		h, e := n.nw.Head(nn.Selection{Output: output, Logits: logits})
		if e != nil {
			return e
		}
		m = h
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("selecting output %q: %w", output, err)
	}
	return m, nil
}
