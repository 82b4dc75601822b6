package onnxlite

import (
	"bytes"
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
		if m, err := Decode(bytes.NewReader(data), opts); err == nil {
			var out bytes.Buffer
			if err := Encode(&out, m); err != nil {
				t.Fatalf("decoded model does not encode: %v", err)
			}
			m2, err := Decode(&out, opts)
			if err != nil {
				t.Fatalf("encoded model does not decode: %v", err)
			}
			if d := irDiff(m, m2); d != "" {
				t.Fatalf("model round trip differs at %s", d)
			}
		}
		if tn, err := DecodeTensor(bytes.NewReader(data), opts); err == nil {
			var out bytes.Buffer
			if err := EncodeTensor(&out, tn); err != nil {
				t.Fatalf("decoded tensor does not encode: %v", err)
			}
			tn2, err := DecodeTensor(&out, opts)
			if err != nil {
				t.Fatalf("encoded tensor does not decode: %v", err)
			}
			if d := irDiff(tn, tn2); d != "" {
				t.Fatalf("tensor round trip differs at %s", d)
			}
		}
	})
}
