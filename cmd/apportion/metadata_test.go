package main

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
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

func TestColumnsBoundByName(t *testing.T) {
	// The softmax example's input (ONNX backend test data 1.12.0,
	// node/test_softmax_example) in a CSV whose header names the model's
	// features (feature_names metadata) out of order, between two columns
	// the model does not read: explain and predict read the values by name,
	// so the outputs are the backend's output_0.pb, the attributions those
	// of the input in the model's order, and the extra columns are listed
	// once on standard error.
	_, x, y, xpb := softmaxCase(t)
	p := withMetadata(t, map[string]string{"feature_names": `["first", "second", "third"]`})
	swapped := writeTemp(t, "swapped.csv", "id,third,first,second,note\n"+
		"r1,"+f32(x[2])+","+f32(x[0])+","+f32(x[1])+",checked\n")
	const note = "swapped.csv: ignored the columns the model does not read: id, note\n"

	code, out, errs := cli(t, "predict", "-model", p, "-input", swapped)
	require.Equal(t, exitOK, code, errs)
	got := decodeJSON(t, out)["outputs"].([]any)[0].(map[string]any)["data"].([]any)
	vals := make([]float64, len(got))
	for i, v := range got {
		vals[i] = v.(float64)
	}
	assertClose(t, y, vals, "predict on the named columns vs output_0.pb")
	assert.Equal(t, 1, strings.Count(errs, note), errs)

	ordered, _ := explainJSONRun(t, exitOK, "-model", p, "-input", xpb)
	doc, errs := explainJSONRun(t, exitOK, "-model", p, "-input", swapped)
	require.Len(t, doc.Explanations, 1)
	assertClose(t, y, doc.Explanations[0].Outputs, "explain on the named columns vs output_0.pb")
	assert.Equal(t, ordered.Explanations[0].Attributions, doc.Explanations[0].Attributions)
	assert.Equal(t, 1, strings.Count(errs, note), errs)

	// A feature the header lacks is named, whichever command reads it.
	missing := writeTemp(t, "missing.csv", "first,second,note\n1,2,x\n")
	for _, cmd := range []string{"explain", "predict"} {
		code, _, errs := cli(t, cmd, "-model", p, "-input", missing)
		assert.Equal(t, exitFail, code, cmd)
		assert.Contains(t, errs, `the model's feature "third" is not a column of the file`, cmd)
	}
}
