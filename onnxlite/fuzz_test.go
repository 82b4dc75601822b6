package onnxlite

import (
	"bytes"
	"io"
	"os"
	"path/filepath"
	"testing"

	"github.com/apportion/apportion/internal/onnxtestdata"
)

// fuzzLimits keep each fuzz execution small.
var fuzzLimits = Limits{MaxModelBytes: 1 << 20, MaxTensorElements: 1 << 16, MaxInitializerBytes: 1 << 20, MaxNodes: 1000, MaxRank: 8}

// FuzzDecode feeds arbitrary bytes to Decode and DecodeTensor. Neither may
// panic; whatever decodes must encode, and decode again to the same IR.
func FuzzDecode(f *testing.F) {
	seeds, _ := filepath.Glob(filepath.Join("testdata", "fuzz-seeds", "*.onnx"))
	// A handful of backend models when the ONNX backend test data (Debian
	// libonnx-testdata 1.12.0) is installed.
	dir := os.Getenv("ONNX_TESTDATA")
	if dir == "" {
		dir = onnxtestdata.DefaultDir
	}
	for _, c := range []string{"node/test_gemm_default_single_elem_vector_bias", "node/test_cast_FLOAT16_to_FLOAT", "pytorch-converted/test_Linear", "node/test_if"} {
		seeds = append(seeds, filepath.Join(dir, c, "model.onnx"), filepath.Join(dir, c, "test_data_set_0", "input_0.pb"))
	}
	for _, s := range seeds {
		if b, err := os.ReadFile(s); err == nil {
			f.Add(b)
		}
	}
	var buf bytes.Buffer
	if err := Encode(&buf, everyKindModel(f)); err != nil {
		f.Fatal(err)
	}
	f.Add(buf.Bytes())

	opts := DecodeOptions{Limits: fuzzLimits}
	f.Fuzz(func(t *testing.T, data []byte) {
		fuzzRoundTrip(t, "model", data, opts, Decode, Encode)
		fuzzRoundTrip(t, "tensor", data, opts, DecodeTensor, EncodeTensor)
	})
}

// fuzzRoundTrip decodes data as a what; when that succeeds, the result must
// encode, and the encoding must decode to the same IR.
func fuzzRoundTrip[T any](t *testing.T, what string, data []byte, opts DecodeOptions,
	decode func(io.Reader, DecodeOptions) (T, error), encode func(io.Writer, T) error) {
	v, err := decode(bytes.NewReader(data), opts)
	if err != nil {
		return
	}
	var out bytes.Buffer
	if err := encode(&out, v); err != nil {
		t.Fatalf("decoded %s does not encode: %v", what, err)
	}
	v2, err := decode(&out, opts)
	if err != nil {
		t.Fatalf("encoded %s does not decode: %v", what, err)
	}
	if d := irDiff(v, v2); d != "" {
		t.Fatalf("%s round trip differs at %s", what, d)
	}
}
