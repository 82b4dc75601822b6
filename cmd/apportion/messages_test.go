package main

import (
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

// goIdentifier matches a word in mixed case, as Go names are written
// (TargetTop, SupportedOps, InputShapes): a capital, lower-case letters,
// another capital.
var goIdentifier = regexp.MustCompile(`\b[A-Za-z]*[A-Z][a-z]+[A-Z][A-Za-z]*\b`)

// plainWords are mixed-case words a message may hold: the operator names of
// the ONNX standard (onnxlite lists those it reads), the ONNX protobuf
// messages, NaN (IEEE 754), the binary prefixes of IEC 80000-13 and NumPy
// (whose .npy format the readers take).
func plainWords() map[string]bool {
	words := map[string]bool{"NaN": true, "NumPy": true, "TensorProto": true, "ModelProto": true, "KiB": true, "MiB": true, "GiB": true}
	for _, op := range onnxlite.SupportedOps() {
		words[op] = true
	}
	return words
}

// TestMessagesSpeakTheUsersLanguage runs the command line's failing cases,
// one per message it can print for a mistake a user makes, and checks each
// line it prints on standard error: no Go identifier (common practice: a
// message names what the user typed or gave, not the code's names), and
// the exit status of a usage error (2) or of a failure (1), as go help
// documents for the go command.
func TestMessagesSpeakTheUsersLanguage(t *testing.T) {
	model, _, _, xpb := softmaxCase(t)
	dir := t.TempDir()
	write := func(name, content string) string {
		p := filepath.Join(dir, name)
		require.NoError(t, os.WriteFile(p, []byte(content), 0o644))
		return p
	}
	mlp, err := filepath.Abs("../../testdata/golden/mlp-s.onnx") // a model whose output is a Gemm's
	require.NoError(t, err)
	empty := write("empty.onnx", "")
	notModel := write("text.onnx", "this is not a model")
	nanJSON := write("nan.json", "[1, NaN, 3]")
	short := write("short.json", "[[1, 2, 3], [1, 2]]")
	badCSV := write("bad.csv", "a,b,c\n1,x,3\n1,2\n1,nan,3\n")
	named := write("named.csv", "first,second\n1,2\n")
	badGroups := write("groups.json", `{"a": [0, 7]}`)
	notJSON := write("groups2.json", `{"a": `)
	pumps := write("pumps.csv", pumpsCSV(t, 0, 6))
	part := filepath.Join(dir, "part.json")
	code, _, errs := cli(t, "summarize", "-allow-incomplete", "-input", pumps, "-steps", "8", "-bootstrap", "10", "-format", "json", "-out", part)
	require.Equal(t, exitOK, code, errs)
	other := filepath.Join(dir, "other.json")
	code, _, errs = cli(t, "summarize", "-input", pumps, "-first-row", "6", "-method", "grad", "-bootstrap", "10", "-format", "json", "-out", other)
	require.Equal(t, exitOK, code, errs)
	withNames := withMetadata(t, map[string]string{"feature_names": `["first", "second", "third"]`})

	for _, c := range []struct {
		code int
		args []string
		want string // part of the message, "" to check the words only
	}{
		{exitUsage, []string{"frobnicate"}, `unknown command "frobnicate"`},
		{exitUsage, []string{"help", "frobnicate"}, ""},
		{exitUsage, []string{"explain", "-steps", "1"}, "-steps must be auto, exact, refine or at least 2 with the trapezoid rule, got 1"},
		{exitUsage, []string{"explain", "-steps", "0"}, "-steps must be auto, exact, refine or a number from 1 to 65536"},
		{exitUsage, []string{"explain", "-steps", "many"}, ""},
		{exitUsage, []string{"explain", "-baseline", "meen"}, "-baseline must be zero, constant:V, mean, median, blur, blur:S or uniform:LO:HI, or the path of a file"},
		{exitUsage, []string{"explain", "-target", "3"}, `-target must be top or an index from 0 to 2 (output "condition" has 3 values), got 3`},
		{exitUsage, []string{"explain", "-target", "-3"}, ""},
		{exitUsage, []string{"explain", "-method", "lime"}, "-method must be one of"},
		{exitUsage, []string{"explain", "-rule", "simpson"}, `-rule must be trapezoid, left, right, midpoint or gauss-legendre, got "simpson"`},
		{exitUsage, []string{"explain", "-tolerance", "0"}, ""},
		{exitUsage, []string{"explain", "-method", "smoothgrad", "-samples", "0"}, ""},
		{exitUsage, []string{"explain", "-method", "smoothgrad", "-noise", "NaN"}, ""},
		{exitUsage, []string{"explain", "-method", "grad", "-steps", "8"}, "-steps applies to -method integrated-gradients only"},
		{exitUsage, []string{"explain", "-format", "xml"}, ""},
		{exitUsage, []string{"explain", "-format", "png"}, "-format png needs -out"},
		{exitUsage, []string{"explain", "-demo", "bridges"}, ""},
		{exitUsage, []string{"explain", "-seed", "x"}, ""},
		{exitUsage, []string{"explain", "-output", "nosuch"}, `-output "nosuch" is not an output of the model`},
		{exitUsage, []string{"explain", "-model", model}, "-input is required"},
		{exitUsage, []string{"explain", "-model", model, "-input", xpb, "-baseline", "blur"}, ""},
		{exitUsage, []string{"explain", "-model", model, "-input", xpb, "-method", "expected-grad"}, "needs -reference"},
		{exitUsage, []string{"explain", "-model", model, "-input", xpb, "-reference", xpb}, ""},
		{exitUsage, []string{"explain", "-model", mlp, "-input", write("row.json", "["+strings.Repeat("0.5,", 29)+"0.5]"), "-logits"}, "-logits explains the input of a final Softmax, LogSoftmax or Sigmoid"},
		{exitFail, []string{"explain", "-model", empty, "-input", xpb}, "empty file"},
		{exitFail, []string{"explain", "-model", notModel, "-input", xpb}, ""},
		{exitFail, []string{"explain", "-model", filepath.Join(dir, "gone.onnx"), "-input", xpb}, ""},
		{exitFail, []string{"explain", "-model", model, "-input", filepath.Join(dir, "gone.csv")}, ""},
		{exitFail, []string{"explain", "-model", model, "-input", write("x.txt", "1")}, ""},
		{exitFail, []string{"explain", "-model", model, "-input", nanJSON}, "NaN at byte 5: expected finite numbers"},
		{exitFail, []string{"explain", "-model", model, "-input", short}, "sample 1: expected 3 values (shape [3]), got 2"},
		{exitFail, []string{"explain", "-model", model, "-input", badCSV}, `line 2, column b: "x" is not a number`},
		{exitFail, []string{"explain", "-model", withNames, "-input", named}, `the model's feature "third" is not a column of the file`},
		{exitFail, []string{"explain", "-model", model, "-input", xpb, "-groups", filepath.Join(dir, "gone.json")}, ""},
		{exitFail, []string{"explain", "-model", model, "-input", xpb, "-groups", badGroups}, ""},
		{exitFail, []string{"explain", "-model", model, "-input", xpb, "-groups", notJSON}, ""},
		{exitUsage, []string{"predict", "-model", model}, "-input is required"},
		{exitUsage, []string{"predict", "-input", xpb}, "-model is required"},
		{exitUsage, []string{"predict", "-model", model, "-input", xpb, "-input", xpb}, "the model has 1 input (x), got 2 -input files"},
		{exitUsage, []string{"predict", "-model", model, "-input", xpb, "-format", "xml"}, ""},
		{exitFail, []string{"predict", "-model", model, "-input", badCSV}, `line 2, column b: "x" is not a number`},
		{exitFail, []string{"predict", "-model", empty, "-input", xpb}, "empty file"},
		{exitUsage, []string{"inspect"}, "-model is required"},
		{exitFail, []string{"inspect", "-model", empty}, "empty file"},
		{exitFail, []string{"inspect", "-model", notModel}, ""},
		{exitUsage, []string{"summarize", "-by", "colour"}, `-by colour: no such column`},
		{exitUsage, []string{"summarize", "-bootstrap", "0"}, ""},
		{exitUsage, []string{"summarize", "-merge"}, ""},
		{exitUsage, []string{"summarize", "-model", model, "-input", xpb, "-by", "x"}, ""},
		{exitUsage, []string{"summarize", "-model", model, "-input", xpb, "-baseline", "mean"}, ""},
		{exitUsage, []string{"summarize", "-target", "9"}, ""},
		{exitFail, []string{"summarize", "-merge", part, part}, "-first-row"},
		{exitFail, []string{"summarize", "-merge", part, other}, "it differs from " + part + " in its method"},
		{exitFail, []string{"summarize", "-merge", part, notJSON}, "-merge " + notJSON + ":"},
		{exitFail, []string{"summarize", "-merge", part, filepath.Join(dir, "gone.json")}, "no such file"},
		{exitUsage, []string{"serve", "-workers", "-1"}, ""},
		{exitUsage, []string{"serve", "-max-body", "0"}, ""},
		{exitUsage, []string{"serve", "-max-body", "lots"}, ""},
		{exitUsage, []string{"serve", "-timeout", "0s"}, ""},
		{exitFail, []string{"serve", "-model", empty}, "empty file"},
	} {
		code, out, errs := cli(t, c.args...)
		assert.Equal(t, c.code, code, "%q: %s", c.args, errs)
		if c.code == exitUsage {
			assert.Empty(t, out, "%q", c.args)
		}
		require.NotEmpty(t, errs, "%q", c.args)
		if c.want != "" {
			assert.Contains(t, errs, c.want, "%q", c.args)
		}
		words := plainWords()
		for _, line := range strings.Split(strings.TrimSpace(errs), "\n") {
			if strings.HasPrefix(line, " ") || strings.HasPrefix(line, "\t") || strings.HasPrefix(line, "Usage:") {
				continue // the flag list printed with a flag error
			}
			if os.Getenv("APPORTION_SHOW_MESSAGES") != "" {
				t.Logf("%d %s", code, line)
			}
			for _, w := range goIdentifier.FindAllString(line, -1) {
				assert.True(t, words[w], "%q prints %q, with the Go identifier %q", c.args, line, w)
			}
		}
	}

	// -steps as -h describes it.
	_, help, _ := cli(t, "explain", "-h")
	assert.Contains(t, help, "at least 2 with the trapezoid rule")
}
