package main

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
)

func TestExplainPNGSeveralSamples(t *testing.T) {
	// Two rows for node/test_softmax_example's model: its input_0.pb values
	// and their negation; one PNG per sample, the index before the
	// extension.
	model, x, _, _ := softmaxCase(t)
	dir := t.TempDir()
	csv := filepath.Join(dir, "two.csv")
	require.NoError(t, os.WriteFile(csv, []byte(f32(x[0])+","+f32(x[1])+","+f32(x[2])+"\n"+
		f32(-x[0])+","+f32(-x[1])+","+f32(-x[2])+"\n"), 0o644))
	out := filepath.Join(dir, "s.png")
	code, _, errs := cli(t, "explain", "-model", model, "-input", csv, "-steps", "16", "-format", "png", "-out", out)
	require.Equal(t, exitOK, code, errs)
	for _, name := range []string{"s_0.png", "s_1.png"} {
		raw, err := os.ReadFile(filepath.Join(dir, name))
		require.NoError(t, err)
		img, err := png.Decode(bytes.NewReader(raw)) // the PNG standard's decoder, image/png
		require.NoError(t, err)
		assert.GreaterOrEqual(t, img.Bounds().Dx(), 256, name)
	}
	_, err := os.Stat(out)
	assert.True(t, os.IsNotExist(err), "with several samples the unsuffixed file is not written")
}

func TestExplainDemoFlag(t *testing.T) {
	for _, name := range []string{"pumps", "welds"} {
		s, err := demo.Get(name)
		require.NoError(t, err)
		digest := sha256.Sum256(s.Model) // FIPS 180-4
		doc, _ := explainJSONRun(t, exitOK, "-demo", name, "-method", "grad")
		assert.Equal(t, "demo:"+s.ModelFile, doc.Model.Path)
		assert.Equal(t, hex.EncodeToString(digest[:]), doc.Model.SHA256, "-demo %s runs the embedded %s", name, s.ModelFile)
	}
	// -baseline mean without -model averages the demo's reference set; the
	// attributions then sum to f(x) − f(mean) (completeness, Sundararajan et
	// al. 2017, Proposition 1), f(mean) being the reported baseline output.
	doc, _ := explainJSONRun(t, exitOK, "-demo", "welds", "-baseline", "mean", "-steps", "16", "-rule", "gauss-legendre", "-allow-incomplete")
	assert.Equal(t, "demo:welds_reference.npy", doc.Settings["reference"])
	e := doc.Explanations[0]
	require.Nil(t, e.Error)
	require.NotNil(t, e.Target)
	require.Len(t, e.BaselineOutputs, 2)
	assert.InDelta(t, e.Outputs[*e.Target]-e.BaselineOutputs[*e.Target], sum(e.Attributions), 0.05*math.Abs(e.Outputs[*e.Target]-e.BaselineOutputs[*e.Target]))

	// Without -model and -demo, the default scenario runs.
	s, err := demo.Get(demo.Default)
	require.NoError(t, err)
	digest := sha256.Sum256(s.Model)
	doc, _ = explainJSONRun(t, exitOK, "-method", "grad")
	assert.Equal(t, hex.EncodeToString(digest[:]), doc.Model.SHA256)
}

func TestExplainPNGUsageErrors(t *testing.T) {
	// Exit status 2 for a usage error, as the go command does (common
	// practice, documented in apportion -h).
	model, _, _, xpb := softmaxCase(t)
	for _, c := range []struct {
		args []string
		msg  string
	}{
		{[]string{"-model", model, "-input", xpb, "-format", "png"}, "-format png needs -out"},
		{[]string{"-demo", "welds", "-model", model}, "-demo selects an embedded model and sample; it cannot be combined with -model"},
		{[]string{"-demo", "bridges"}, `unknown scenario "bridges": want one of pumps, welds`},
		{[]string{"-format", "gif"}, "-format must be table, json, csv, npy or png"},
	} {
		code, stdout, errs := cli(t, append([]string{"explain"}, c.args...)...)
		assert.Equal(t, exitUsage, code, "%v: %s", c.args, errs)
		assert.Contains(t, errs, c.msg, "%v", c.args)
		assert.Empty(t, stdout)
	}
	code, out, _ := cli(t, "explain", "-h")
	assert.Equal(t, exitOK, code)
	for _, s := range []string{"-demo", "a_0.png", "default: the embedded demo model"} {
		assert.True(t, strings.Contains(out, s), "explain -h mentions %q", s)
	}
	assert.NotContains(t, out, "(required)")
}
