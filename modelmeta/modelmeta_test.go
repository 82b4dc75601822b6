package modelmeta_test

import (
	"bytes"
	"encoding/json"
	"os"
	"os/exec"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/debpython"
	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/internal/testfiles"
	"github.com/apportion/apportion/modelmeta"
	"github.com/apportion/apportion/onnxlite"
)

// softmaxModel is node/test_softmax_example of the ONNX backend test data
// 1.12.0: y = Softmax(x), x and y of shape [1, 3] (python3-onnx 1.12.0).
func softmaxModel(t *testing.T) *onnxlite.Model {
	t.Helper()
	raw, err := os.ReadFile(filepath.Join(onnxtestdata.Dir(t), "node", "test_softmax_example", "model.onnx"))
	require.NoError(t, err)
	m, err := onnxlite.Decode(bytes.NewReader(raw), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	return m
}

func TestWriteReadByTheONNXPackage(t *testing.T) {
	// Names written onto a model are what the ONNX project's own reader
	// finds in metadata_props (python3-onnx 1.12.0, onnx.load), and what
	// Read reads back.
	python := debpython.Require(t, "onnx")
	m := softmaxModel(t)
	meta := modelmeta.Meta{
		Features: []string{"flow", "temp", "rpm"},
		Units:    []string{"m³/h", "°C", ""},
		Classes:  []string{"normal", "degraded", "failing"},
	}
	require.NoError(t, modelmeta.Write(m, meta))
	var buf bytes.Buffer
	require.NoError(t, onnxlite.Encode(&buf, m))
	path := filepath.Join(t.TempDir(), "named.onnx")
	require.NoError(t, os.WriteFile(path, buf.Bytes(), 0o644))

	out, err := exec.Command(python, "-c",
		"import json, sys, onnx\n"+
			"m = onnx.load(sys.argv[1])\n"+
			"print(json.dumps({p.key: p.value for p in m.metadata_props}))", path).Output()
	require.NoError(t, err)
	var props map[string]string
	require.NoError(t, json.Unmarshal(out, &props))
	for key, want := range map[string][]string{"feature_names": meta.Features, "feature_units": meta.Units, "class_names": meta.Classes} {
		var got []string
		require.NoError(t, json.Unmarshal([]byte(props[key]), &got), key)
		assert.Equal(t, want, got, key)
	}

	back, err := onnxlite.Decode(bytes.NewReader(buf.Bytes()), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	assert.Equal(t, meta, modelmeta.Read(back))
}

func TestWriteRefusesListsThatDoNotFit(t *testing.T) {
	// The softmax model takes and gives 3 values per sample (python3-onnx
	// 1.12.0: x and y are [1, 3]).
	m := softmaxModel(t)
	for _, c := range []struct {
		meta modelmeta.Meta
		says string
	}{
		{modelmeta.Meta{Features: []string{"a", "b"}}, "2 feature names, the model's input takes 3 values per sample"},
		{modelmeta.Meta{Features: []string{"a", "b", "c"}, Units: []string{"cm"}}, "1 units for 3 features"},
		{modelmeta.Meta{Classes: []string{"yes", "no"}}, `2 class names, the model's output "y" has 3 values per sample`},
	} {
		assert.ErrorContains(t, modelmeta.Write(m, c.meta), c.says)
	}
	assert.Empty(t, m.Metadata, "a refused list writes nothing")
}

func TestReadConventions(t *testing.T) {
	// A comma-separated list reads like a JSON array; "classes" stands in
	// for class_names; a JSON number in an array is written as JSON.
	meta := modelmeta.FromProps(map[string]string{
		"feature_names": " first, second ,third",
		"feature_units": `["cm", "kg", 3]`,
		"classes":       "alpha,beta",
	})
	assert.Equal(t, modelmeta.Meta{
		Features: []string{"first", "second", "third"},
		Units:    []string{"cm", "kg", "3"},
		Classes:  []string{"alpha", "beta"},
	}, meta)
	assert.Equal(t, "second (kg)", meta.Label(1))
	assert.Equal(t, "beta", meta.Class(1))
	assert.Equal(t, "2", meta.Class(2), "an unnamed class by its index")
	// Without one name per value: indices, multi-indices from rank 2.
	assert.Equal(t, []string{"0", "1"}, meta.Labels([]int{2}))
	assert.Equal(t, []string{"[0,0]", "[0,1]", "[1,0]", "[1,1]"}, meta.Labels([]int{2, 2}))
}

func TestReadmePythonSnippet(t *testing.T) {
	// The README's snippet for naming a model's features where it is
	// exported, run with the ONNX project's Python package (python3-onnx
	// 1.12.0) on a copy of node/test_softmax_example (three inputs, three
	// classes): Read finds what it wrote.
	python := debpython.Require(t, "onnx")
	code := testfiles.ReadmeCode(t, "../README.md", "Naming the features of your own model", "python")

	dir := t.TempDir()
	raw, err := os.ReadFile(filepath.Join(onnxtestdata.Dir(t), "node", "test_softmax_example", "model.onnx"))
	require.NoError(t, err)
	require.NoError(t, os.WriteFile(filepath.Join(dir, "model.onnx"), raw, 0o644))
	cmd := exec.Command(python, "-c", code)
	cmd.Dir = dir
	out, err := cmd.CombinedOutput()
	require.NoError(t, err, "%s", out)

	named, err := os.ReadFile(filepath.Join(dir, "model-named.onnx"))
	require.NoError(t, err)
	m, err := onnxlite.Decode(bytes.NewReader(named), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	meta := modelmeta.Read(m)
	assert.Equal(t, []string{"bearing_temp", "vibration_rms", "flow"}, meta.Features)
	assert.Equal(t, []string{"°C", "mm/s", "m³/h"}, meta.Units)
	assert.Equal(t, []string{"normal", "degraded", "failing"}, meta.Classes)
	assert.Equal(t, []string{"bearing_temp (°C)", "vibration_rms (mm/s)", "flow (m³/h)"}, meta.Labels([]int{3}))
}
