package main

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/internal/testfiles"
)

// cli runs the program in-process.
func cli(t *testing.T, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	code = run(args, strings.NewReader(""), &out, &errb)
	return code, out.String(), errb.String()
}

// caseDir is a backend test case directory, skipping when the data is absent.
func caseDir(t *testing.T, suiteAndName string) string {
	t.Helper()
	dir := filepath.Join(onnxtestdata.Dir(t), suiteAndName)
	_, err := os.Stat(filepath.Join(dir, "model.onnx"))
	require.NoError(t, err)
	return dir
}

// setFiles returns the input and output .pb files of data set 0 of a case.
func setFiles(t *testing.T, dir string) (inputs, outputs []string) {
	t.Helper()
	in, out := onnxtestdata.SetFiles(filepath.Join(dir, "test_data_set_0"))
	require.NotEmpty(t, in)
	require.NotEmpty(t, out)
	return in, out
}

// readPBTensor reads a TensorProto of the backend data as float64.
var readPBTensor = testfiles.ReadPB

// argmax is the index of the largest value, the first on ties.
var argmax = gradattr.Top

// assertClose checks got against want with the tolerances the ONNX backend
// node tests use (rtol 1e-3, atol 1e-7: onnx/backend/test/case/node/__init__.py
// in python3-onnx 1.12.0).
func assertClose(t *testing.T, want, got []float64, msg string) {
	t.Helper()
	require.Len(t, got, len(want), msg)
	for i := range want {
		tol := 1e-7 + 1e-3*abs(want[i])
		assert.InDelta(t, want[i], got[i], tol, "%s: element %d", msg, i)
	}
}

func abs(v float64) float64 {
	if v < 0 {
		return -v
	}
	return v
}

func decodeJSON(t *testing.T, s string) map[string]any {
	t.Helper()
	var v map[string]any
	require.NoError(t, json.Unmarshal([]byte(s), &v), "output: %s", s)
	return v
}

func keys(m map[string]any) []string {
	out := make([]string, 0, len(m))
	for k := range m {
		out = append(out, k)
	}
	return out
}

func TestHelp(t *testing.T) {
	// Conventions of the go command (common practice): "help" and "-h"
	// print to stdout and exit 0; the subcommands are listed.
	code, out, _ := cli(t, "help")
	require.Equal(t, exitOK, code)
	for _, c := range []string{"explain", "predict", "inspect"} {
		assert.Contains(t, out, "\t"+c+" ")
	}
	assert.Contains(t, out, "does not say what causes the outcome in the world")
	assert.Contains(t, out, "reviewed by qualified people")

	code, out, _ = cli(t, "explain", "-h")
	require.Equal(t, exitOK, code)
	assert.Contains(t, out, "Usage: apportion explain")
	assert.Contains(t, out, "Example:")
	assert.Contains(t, out, "-baseline")
	assert.Contains(t, out, "does not say what causes the outcome in the world")
	assert.Contains(t, out, "(credit, health, hiring")

	for _, c := range []string{"inspect", "predict"} {
		code, out, _ = cli(t, c, "-h")
		require.Equal(t, exitOK, code, c)
		assert.Contains(t, out, "Usage: apportion "+c, c)
		assert.Contains(t, out, "Example:", c)
		assert.Contains(t, out, "-model", c)
	}
	code, out, _ = cli(t, "help", "predict")
	require.Equal(t, exitOK, code)
	assert.Contains(t, out, "Usage: apportion predict")
}

func TestUsageErrors(t *testing.T) {
	// Exit status 2 for usage errors, as the go command and the flag
	// package do (common practice).
	cases := [][]string{
		{},
		{"frobnicate"},
		{"help", "frobnicate"},
		{"inspect"},
		{"inspect", "-model", "m.onnx", "-format", "xml"},
		{"inspect", "-nosuchflag"},
		{"inspect", "-model", "m.onnx", "extra"},
		{"predict", "-input", "x.csv"},
		{"explain", "-model", "m.onnx"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-method", "lime"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-format", "xml"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-steps", "0"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-steps", "many"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-steps", "exactly"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-target", "-3"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-tolerance", "0"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-samples", "0"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-noise", "NaN"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-rule", "simpson"},
		{"explain", "-model", "m.onnx", "-input", "x.csv", "-method", "expected-grad"},
	}
	for _, args := range cases {
		code, out, errs := cli(t, args...)
		assert.Equal(t, exitUsage, code, "%q", args)
		assert.Empty(t, out, "%q", args)
		assert.NotEmpty(t, errs, "%q", args)
	}
}

func TestExplainFlagApplicability(t *testing.T) {
	// Flags a method does not read are usage errors, so that a typo in the
	// method cannot silently drop a setting (common practice).
	model, _, _, xpb := softmaxCase(t)
	for _, args := range [][]string{
		{"-method", "grad", "-baseline", "mean"},
		{"-method", "smoothgrad", "-steps", "8"},
		{"-method", "ig", "-noise", "0.1"},
		{"-method", "grad-input", "-samples", "10"},
		{"-method", "ig", "-reference", xpb},
		{"-baseline", "blur"}, // the softmax sample has one axis, blur needs two
		{"-baseline", "blur:-1"},
	} {
		code, _, errs := cli(t, append([]string{"explain", "-model", model, "-input", xpb}, args...)...)
		assert.Equal(t, exitUsage, code, "%q: %s", args, errs)
	}
}
