package onnxlite

import (
	"bytes"
	"errors"
	"fmt"
	"os"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/onnxtestdata"
)

// graphSignature returns the declared types of the runtime inputs (graph
// inputs that are not initializers) and of the outputs of the model at path,
// decoding nodes leniently so that models with subgraphs still tell them.
func graphSignature(t *testing.T, path string) (inputs, outputs []*Type) {
	t.Helper()
	raw, err := os.ReadFile(path)
	require.NoError(t, err)
	d := newDecoder(DecodeOptions{})
	d.dropRefused = true
	m, err := d.model(raw)
	if err != nil || m.Graph == nil {
		return nil, nil
	}
	inits := map[string]bool{}
	for _, in := range m.Graph.Initializers {
		inits[in.Name] = true
	}
	for _, in := range m.Graph.Inputs {
		if !inits[in.Name] {
			inputs = append(inputs, in.Type)
		}
	}
	for _, out := range m.Graph.Outputs {
		outputs = append(outputs, out.Type)
	}
	return inputs, outputs
}

// TestBackendDecode decodes every model and every test-data tensor of the
// ONNX backend test data (Debian libonnx-testdata 1.12.0) and round-trips
// each through Encode.
func TestBackendDecode(t *testing.T) {
	dir := onnxtestdata.Dir(t)
	start := time.Now()
	var models, subgraph, sparse, tensors, nonTensor, roundTrips int
	for _, c := range onnxtestdata.Cases(t, dir) {
		name := c.Suite + "/" + c.Name
		m, err := DecodeFile(c.Model, DecodeOptions{})
		switch {
		case errors.Is(err, ErrSubgraph):
			subgraph++
		case errors.Is(err, ErrUnsupportedEncoding):
			// Only sparse tensors may be refused this way in the backend data.
			if assert.Contains(t, err.Error(), "sparse", name) {
				sparse++
			}
		case err != nil:
			t.Errorf("%s: %v", name, err)
		default:
			models++
			m2 := roundTripModel(t, m, DecodeOptions{})
			if d := irDiff(m, m2); d != "" {
				t.Errorf("%s: model round trip differs at %s", name, d)
			} else {
				roundTrips++
			}
		}
		ins, outs := graphSignature(t, c.Model)
		for _, set := range c.Sets {
			inFiles, outFiles := onnxtestdata.SetFiles(set)
			check := func(files []string, types []*Type) {
				for i, f := range files {
					if i < len(types) && types[i] != nil && types[i].Kind != KindTensor {
						// A SequenceProto, MapProto or OptionalProto, not a TensorProto.
						nonTensor++
						continue
					}
					tn, err := DecodeTensorFile(f, DecodeOptions{})
					if !assert.NoError(t, err, name) {
						continue
					}
					tensors++
					var buf bytes.Buffer
					require.NoError(t, EncodeTensor(&buf, tn))
					tn2, err := DecodeTensor(&buf, DecodeOptions{})
					require.NoError(t, err)
					if d := irDiff(tn, tn2); d != "" {
						t.Errorf("%s: tensor round trip differs at %s", f, d)
					} else {
						roundTrips++
					}
				}
			}
			check(inFiles, ins)
			check(outFiles, outs)
		}
	}
	summary := fmt.Sprintf("onnxlite backend decode: decoded %d models, refused %d with subgraphs and %d with sparse tensors, decoded %d tensors, skipped %d non-tensor values, round-tripped %d, in %v",
		models, subgraph, sparse, tensors, nonTensor, roundTrips, time.Since(start).Round(time.Millisecond))
	t.Log(summary)
	fmt.Println(summary)
	// The 1.12.0 data has hundreds of models; a near-empty count means the
	// walk went wrong, not that decoding succeeded.
	assert.Greater(t, models, 900)
	assert.Greater(t, tensors, 2000)
}
