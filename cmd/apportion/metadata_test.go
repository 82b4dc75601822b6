package main

import (
	"bytes"
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/render"
)

// withMetadata re-encodes the softmax backend model with metadata_props
// (ONNX IR: ModelProto.metadata_props, string key/value pairs).
func withMetadata(t *testing.T, md map[string]string) string {
	t.Helper()
	model, _, _, _ := softmaxCase(t)
	m, err := explain.ReadModel(model)
	require.NoError(t, err)
	m.Graph.Metadata = md
	var buf bytes.Buffer
	require.NoError(t, onnxlite.Encode(&buf, m.Graph))
	p := filepath.Join(t.TempDir(), "softmax_md.onnx")
	require.NoError(t, os.WriteFile(p, buf.Bytes(), 0o644))
	return p
}

func TestMetadataNames(t *testing.T) {
	// The softmax example has 3 inputs and 3 outputs per sample
	// (python3-onnx 1.12.0); its output_0.pb top class is index 2 (the
	// largest of the backend data, checked below).
	_, x, y, xpb := softmaxCase(t)
	require.Equal(t, 2, argmax(y))
	md := map[string]string{
		"feature_names": `["first", "second", "third"]`,
		"feature_units": "cm, kg, s",
		"class_names":   "alpha,beta,gamma",
	}
	p := withMetadata(t, md)

	code, out, errs := cli(t, "inspect", "-model", p, "-format", "json")
	require.Equal(t, exitOK, code, errs)
	doc := decodeJSON(t, out)
	want := map[string]any{}
	for k, v := range md {
		want[k] = v
	}
	assert.Equal(t, want, doc["metadata"])

	code, out, errs = cli(t, "predict", "-model", p, "-input", xpb, "-format", "table")
	require.Equal(t, exitOK, code, errs)
	assert.Regexp(t, `(?m)^    gamma\s+\S+  <- top$`, out)
	assert.Regexp(t, `(?m)^    alpha\s+\S+$`, out)

	code, out, errs = cli(t, "explain", "-model", p, "-input", xpb)
	require.Equal(t, exitOK, code, errs)
	assert.Contains(t, out, "target 2 (gamma)")
	assert.Regexp(t, `(?m)^  first \(cm\)\s+`+regexpNum(x[0]), out)
	assert.Regexp(t, `(?m)^  third \(s\)\s+`, out)

	// A comma list of class names under "classes" works the same way.
	p = withMetadata(t, map[string]string{"classes": "alpha, beta, gamma"})
	code, out, _ = cli(t, "predict", "-model", p, "-input", xpb, "-format", "table")
	require.Equal(t, exitOK, code)
	assert.Regexp(t, `(?m)^    gamma\s+\S+  <- top$`, out)
}

func regexpNum(v float64) string {
	s := render.Number(v)
	out := ""
	for _, r := range s {
		if r == '.' || r == '+' || r == '-' {
			out += `\`
		}
		out += string(r)
	}
	return out
}
