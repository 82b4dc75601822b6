package main

import (
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestInspectJSONConv(t *testing.T) {
	dir := caseDir(t, "node/test_conv_with_strides_padding")
	code, out, errs := cli(t, "inspect", "-model", filepath.Join(dir, "model.onnx"), "-format", "json")
	require.Equal(t, exitOK, code, errs)
	doc := decodeJSON(t, out)
	// The schema of inspect's JSON.
	assert.ElementsMatch(t, []string{"inputs", "outputs", "opset", "producer", "ops", "parameters", "metadata", "unsupported",
		"max_opset", "fold_only", "explainable"}, keys(doc))

	// Values read from the file with python3-onnx 1.12.0
	// (onnx.load(...).graph.input / .output / .opset_import / .producer_name).
	assert.Equal(t, []any{
		map[string]any{"name": "x", "type": "float32", "shape": []any{1.0, 1.0, 7.0, 5.0}, "use": "data"},
		map[string]any{"name": "W", "type": "float32", "shape": []any{1.0, 1.0, 3.0, 3.0}, "use": "data"},
	}, doc["inputs"])
	assert.Equal(t, []any{
		map[string]any{"name": "y", "type": "float32", "shape": []any{1.0, 1.0, 4.0, 3.0}},
	}, doc["outputs"])
	assert.Equal(t, 11.0, doc["opset"])
	assert.Equal(t, "backend-test", doc["producer"])
	assert.Equal(t, map[string]any{"Conv": 1.0}, doc["ops"])
	assert.Equal(t, 0.0, doc["parameters"]) // no initializers
	assert.Equal(t, map[string]any{}, doc["metadata"])
	assert.Equal(t, []any{}, doc["unsupported"])
	// ONNX Runtime 1.30 accepts opsets up to 26 (testdata/ort/README.md).
	assert.Equal(t, 26.0, doc["max_opset"])
	assert.Equal(t, []any{}, doc["fold_only"])
	// x is the first floating-point input; the weights W are a second
	// run-time input, held at each sample's values.
	assert.Equal(t, "yes", doc["explainable"])
}

func TestInspectJSONInitializersAndSymbolicDims(t *testing.T) {
	// pytorch-converted/test_Linear, read with python3-onnx 1.12.0: graph
	// inputs "0" [4,10], "1" [8,10] and "2" [8], the last two backed by
	// initializers (8·10 + 8 = 88 float elements); output "3" [4,8]; one
	// Gemm; opset 6; producer "pytorch".
	dir := caseDir(t, "pytorch-converted/test_Linear")
	code, out, errs := cli(t, "inspect", "-model", filepath.Join(dir, "model.onnx"), "-format", "json")
	require.Equal(t, exitOK, code, errs)
	doc := decodeJSON(t, out)
	assert.Equal(t, []any{map[string]any{"name": "0", "type": "float32", "shape": []any{4.0, 10.0}, "use": "data"}}, doc["inputs"])
	assert.Equal(t, []any{map[string]any{"name": "3", "type": "float32", "shape": []any{4.0, 8.0}}}, doc["outputs"])
	assert.Equal(t, 88.0, doc["parameters"])
	assert.Equal(t, 6.0, doc["opset"])
	assert.Equal(t, "pytorch", doc["producer"])
	assert.Equal(t, map[string]any{"Gemm": 1.0}, doc["ops"])

	// simple/test_sequence_model8, read with python3-onnx 1.12.0: input X
	// float [dim_param "n"], Splits int64 [3]; output len int64 [] (scalar);
	// nodes SplitToSequence and SequenceLength (unnamed), opset 12.
	// apportion runs no sequence operators (onnxlite.SupportedOps), and
	// onnxlite names an unnamed node "#index".
	dir = caseDir(t, "simple/test_sequence_model8")
	code, out, errs = cli(t, "inspect", "-model", filepath.Join(dir, "model.onnx"), "-format", "json")
	require.Equal(t, exitOK, code, errs)
	doc = decodeJSON(t, out)
	assert.Equal(t, []any{
		map[string]any{"name": "X", "type": "float32", "shape": []any{"n"}, "use": "data"},
		map[string]any{"name": "Splits", "type": "int64", "shape": []any{3.0}, "use": "data"},
	}, doc["inputs"])
	assert.Equal(t, []any{map[string]any{"name": "len", "type": "int64", "shape": []any{}}}, doc["outputs"])
	assert.Equal(t, 12.0, doc["opset"])
	assert.Equal(t, map[string]any{"SplitToSequence": 1.0, "SequenceLength": 1.0}, doc["ops"])
	assert.Equal(t, []any{
		map[string]any{"op": "SplitToSequence", "node": "#0"},
		map[string]any{"op": "SequenceLength", "node": "#1"},
	}, doc["unsupported"])
	assert.Regexp(t, `^no: not supported by apportion: operators SplitToSequence`, doc["explainable"])
}

func TestInspectTable(t *testing.T) {
	// Same facts as TestInspectJSONConv (python3-onnx 1.12.0), for people.
	dir := caseDir(t, "node/test_conv_with_strides_padding")
	code, out, errs := cli(t, "inspect", "-model", filepath.Join(dir, "model.onnx"))
	require.Equal(t, exitOK, code, errs)
	assert.Regexp(t, `(?m)^opset\s+11$`, out)
	assert.Regexp(t, `(?m)^producer\s+backend-test$`, out)
	assert.Regexp(t, `(?m)^  x\s+float32\s+\[1 1 7 5\]$`, out)
	assert.Regexp(t, `(?m)^  W\s+float32\s+\[1 1 3 3\]$`, out)
	assert.Regexp(t, `(?m)^  y\s+float32\s+\[1 1 4 3\]$`, out)
	assert.Regexp(t, `(?m)^  Conv\s+1$`, out)
	assert.Contains(t, out, "unsupported operators: none")
	assert.Regexp(t, `(?m)^explainable: yes$`, out)
}

func TestInspectBadModel(t *testing.T) {
	dir := caseDir(t, "pytorch-converted/test_Linear")
	raw, err := os.ReadFile(filepath.Join(dir, "model.onnx"))
	require.NoError(t, err)
	tmp := t.TempDir()
	// A prefix of a valid file is a truncated protobuf (the encoding's
	// length-delimited fields run past the end).
	for _, n := range []int{len(raw) / 2, 7, 1} {
		p := filepath.Join(tmp, "truncated.onnx")
		require.NoError(t, os.WriteFile(p, raw[:n], 0o644))
		code, out, errs := cli(t, "inspect", "-model", p)
		assert.Equal(t, exitFail, code, "prefix of %d bytes", n)
		assert.Empty(t, out)
		assert.Contains(t, errs, "truncated.onnx", "prefix of %d bytes", n)
	}
	code, _, errs := cli(t, "inspect", "-model", filepath.Join(tmp, "absent.onnx"))
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errs, "absent.onnx")
}
