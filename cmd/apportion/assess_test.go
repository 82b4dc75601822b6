package main

import (
	"encoding/json"
	"image/png"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/fidelity"
	"github.com/apportion/apportion/gradattr"
)

// With no flags, assess scores every method of gradattr's table on the
// pumps demo's first 20 held-out pumps the model classes failing
// (demo/data/README.md: 101 failing pumps held out), with one row for the
// random orders, and prints no progress when standard error is not a
// terminal. The README shows what it prints, the tables without the notes
// below them.
func TestAssessDemoNoFlags(t *testing.T) {
	code, out, errOut := cli(t, "assess")
	require.Equal(t, exitOK, code, errOut)
	t.Run("README", func(t *testing.T) {
		skipUnlessRecordedKernels(t, "the README's tables were")
		block := readmeBlock(t, "$ apportion assess")
		assert.True(t, strings.HasPrefix(out, block), "the README shows\n%s\nassess prints\n%s", block, out)
	})
	assert.Contains(t, out, "demo:pumps.onnx on demo:pumps_test.csv, the samples classed failing")
	assert.Contains(t, out, "20 samples scored")
	for _, m := range fidelity.Scorable() {
		assert.Contains(t, out, "\n  "+m.Title()+" ", "a row for %s", m)
	}
	assert.NotContains(t, out, gradattr.MethodGradCAM.Title(), "Grad-CAM maps a layer, not the input's features")
	assert.Contains(t, out, "random order")
	assert.Contains(t, out, "to dense1")
	assert.NotContains(t, errOut, "assessed")
}

// The welds demo is scored by 4×4 patches (64 units), its four layers
// randomized from dense2 down to conv1; -format json writes the report.
func TestAssessWeldsJSON(t *testing.T) {
	code, out, errOut := cli(t, "assess", "-demo", "welds", "-limit", "2", "-methods", "grad,ig", "-metrics", "deletion,randomization", "-format", "json")
	require.Equal(t, exitOK, code, errOut)
	var rep fidelity.Report
	require.NoError(t, json.Unmarshal([]byte(out), &rep))
	assert.Equal(t, 2, rep.Samples)
	assert.Equal(t, 64, rep.Settings.Units)
	assert.Equal(t, []string{"conv1", "conv2", "dense1", "dense2"}, rep.Layers)
	require.Len(t, rep.Methods, 2)
	assert.Equal(t, gradattr.MethodIntegratedGradients, rep.Methods[1].Method)
	assert.Len(t, rep.Methods[1].Randomization, 4)
	assert.Nil(t, rep.Methods[1].Insertion, "insertion was not asked for")
	assert.NotNil(t, rep.Methods[1].Randomization[3].SSIM, "welds are images")
}

// Bad rows are reported and skipped, never the run lost: a row that is
// not a number and one that holds NaN, among good ones.
func TestAssessSkipsBadRows(t *testing.T) {
	sc, err := demo.Get("pumps")
	require.NoError(t, err)
	dir := t.TempDir()
	model := filepath.Join(dir, "pumps.onnx")
	require.NoError(t, os.WriteFile(model, sc.Model, 0o644))
	rows := strings.Split(pumpsCSV(t, 0, 6), "\n")
	rows[2] = strings.Replace(rows[2], ",", ",oops", 1)
	rows[4] = strings.Replace(rows[4], ",", ",NaN", 1)
	input := writeTemp(t, "rows.csv", strings.Join(rows, "\n"))
	code, out, errOut := cli(t, "assess", "-model", model, "-input", input, "-methods", "ig", "-metrics", "deletion,completeness")
	require.Equal(t, exitOK, code, errOut)
	assert.Contains(t, out, "4 samples scored, 2 samples skipped")
	assert.Contains(t, errOut, "sample 1 skipped")
	assert.Contains(t, errOut, "sample 3 skipped")
	assert.Contains(t, out, "4 of 4", "integrated gradients' completeness")
}

func TestAssessPNGFile(t *testing.T) {
	path := filepath.Join(t.TempDir(), "a.png")
	code, _, errOut := cli(t, "assess", "-limit", "3", "-metrics", "deletion,insertion,randomization", "-format", "png", "-out", path)
	require.Equal(t, exitOK, code, errOut)
	f, err := os.Open(path)
	require.NoError(t, err)
	defer f.Close()
	_, err = png.Decode(f)
	require.NoError(t, err)
}

func TestAssessUsageErrors(t *testing.T) {
	for _, tc := range []struct {
		args []string
		msg  string
	}{
		{[]string{"-format", "csv"}, "-format must be table, json or png"},
		{[]string{"-format", "png"}, "-format png needs -out"},
		{[]string{"-metrics", "deletion,speed"}, `metric "speed", want one of deletion, insertion`},
		{[]string{"-methods", "ig,magic"}, `-methods: "magic" is not a method`},
		{[]string{"-class", "broken"}, "-class must be one of normal, degraded, failing or an index from 0 to 2"},
		{[]string{"-model", "m.onnx"}, "-input is required with -model"},
		{[]string{"-baseline", "blur"}, "-baseline must be zero, constant:V, mean or median"},
		{[]string{"-orders", "0"}, "-orders must be at least 1"},
	} {
		code, _, errOut := cli(t, append([]string{"assess"}, tc.args...)...)
		assert.Equal(t, exitUsage, code, "%v: %s", tc.args, errOut)
		assert.Contains(t, errOut, tc.msg, "%v", tc.args)
	}
}
