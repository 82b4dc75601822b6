package main

import (
	"encoding/json"
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// perturbDoc is the part of the explain document the methods that switch
// features on and off add.
type perturbDoc struct {
	Settings     map[string]any `json:"settings"`
	Explanations []struct {
		Target          *int      `json:"target"`
		Outputs         []float64 `json:"outputs"`
		Attributions    []float64 `json:"attributions"`
		BaselineOutputs []float64 `json:"baseline_outputs"`
		StandardErrors  []float64 `json:"standard_errors"`
		Estimator       string    `json:"estimator"`
		Fidelity        *float64  `json:"fidelity"`
		Intercept       *float64  `json:"intercept"`
		Completeness    *struct {
			Sum, Expected float64
			Judged, OK    bool
		} `json:"completeness"`
		Groups *struct {
			Names          []string  `json:"names"`
			Attributions   []float64 `json:"attributions"`
			StandardErrors []float64 `json:"standard_errors"`
			Segments       []int     `json:"segments"`
			Partition      bool      `json:"partition"`
		} `json:"groups"`
		Error *string `json:"error"`
	} `json:"explanations"`
}

func perturbRun(t *testing.T, args ...string) perturbDoc {
	t.Helper()
	code, out, errs := cli(t, append([]string{"explain", "-format", "json"}, args...)...)
	require.Equal(t, exitOK, code, errs)
	var doc perturbDoc
	require.NoError(t, json.Unmarshal([]byte(out), &doc), out)
	require.Len(t, doc.Explanations, 1)
	require.Nil(t, doc.Explanations[0].Error)
	return doc
}

func TestExplainShapleyLogitsClosedForm(t *testing.T) {
	// With -logits the explained value of node/test_softmax_example is the
	// Softmax's input, x itself: F(x) = x_k is linear, so its Shapley
	// values over a reference set R are φ_i = δ_ik (x_k − mean_r r_k)
	// (Lundberg & Lee 2017, the linear case) for every estimator, and they
	// sum to F(x) − mean_r F(r) (efficiency, Shapley 1953). The outputs at
	// the reference point are the mean reference row.
	model, x, _, xpb := softmaxCase(t)
	ref := filepath.Join(t.TempDir(), "ref.json")
	rows := []float64{0, 0, 0, 1, -2, 0.5, 2, 1, -1}
	writeJSON(t, ref, []int{3, 3}, rows)
	mean := []float64{1, -1.0 / 3, -0.5 / 3}
	for _, est := range []string{"auto", "exact", "regression", "permutation"} {
		doc := perturbRun(t, "-model", model, "-input", xpb, "-logits", "-target", "1", "-method", "shapley",
			"-reference", ref, "-estimator", est, "-coalitions", "16")
		e := doc.Explanations[0]
		want := []float64{0, x[1] - mean[1], 0}
		assertClose(t, want, e.Attributions, est)
		assertClose(t, mean, e.BaselineOutputs, est+": baseline_outputs")
		require.NotNil(t, e.Completeness, est)
		assert.True(t, e.Completeness.Judged && e.Completeness.OK, est)
		assert.InDelta(t, x[1]-mean[1], e.Completeness.Expected, 1e-6, est)
		assert.InDelta(t, e.Completeness.Expected, e.Completeness.Sum, 1e-12, est)
		assert.Equal(t, est, doc.Settings["estimator"])
		assert.Equal(t, 16.0, doc.Settings["coalitions"])
		assert.Equal(t, 100.0, doc.Settings["reference_rows"])
		assert.Equal(t, 3.0, doc.Settings["references"])
		switch est {
		case "auto", "exact":
			assert.Equal(t, "exact", e.Estimator)
			assert.Nil(t, e.StandardErrors)
		default:
			assert.Equal(t, est, e.Estimator)
			require.Len(t, e.StandardErrors, 3)
			for _, se := range e.StandardErrors {
				assert.Less(t, se, 1e-12, "a linear game has no sampling error")
			}
		}
	}
	// K = 1 of the 3 rows: the value function is that row's, so the
	// expected value is x₁ minus one of the rows' second values.
	doc := perturbRun(t, "-model", model, "-input", xpb, "-logits", "-target", "1", "-method", "shapley",
		"-reference", ref, "-reference-rows", "1")
	got := x[1] - doc.Explanations[0].Completeness.Expected
	near := 0
	for _, r := range []float64{0, -2, 1} {
		if abs(got-r) < 1e-6 {
			near++
		}
	}
	assert.Equal(t, 1, near, "x₁ − expected = %v is one row's second value", got)

	// The table shows the standard errors of a sampled estimator.
	code, out, errs := cli(t, "explain", "-model", model, "-input", xpb, "-logits", "-target", "1", "-method", "shapley",
		"-reference", ref, "-estimator", "permutation", "-coalitions", "16")
	require.Equal(t, exitOK, code, errs)
	assert.Regexp(t, `(?m)^  feature\s+value\s+attribution\s+± s\.e\.$`, out)
	assert.Regexp(t, `completeness: sum \S+  expected \S+  gap \S+  relative gap \S+  tolerance 1e-06  ok`, out)
}

func TestExplainSurrogateLogits(t *testing.T) {
	// The surrogate of the linear F(x) = x_k (the Softmax's input) against
	// the zero baseline: coefficients w_i x_i = δ_ik x_k shrunk by the
	// ridge penalty by well under 1% (Ribeiro et al. 2016 with a linear f;
	// Hoerl & Kennard 1970 for the shrinkage: about λ / Var_π(z_k)), an
	// intercept near F(0) = 0, and a weighted R² near 1.
	model, x, _, xpb := softmaxCase(t)
	doc := perturbRun(t, "-model", model, "-input", xpb, "-logits", "-target", "2", "-method", "surrogate", "-coalitions", "512", "-kernel-width", "0.5")
	e := doc.Explanations[0]
	assert.InDelta(t, x[2], e.Attributions[2], 0.01*abs(x[2]))
	assert.InDelta(t, 0, e.Attributions[0], 0.01*abs(x[2]))
	require.NotNil(t, e.Fidelity)
	require.NotNil(t, e.Intercept)
	assert.Greater(t, *e.Fidelity, 0.999)
	assert.InDelta(t, 0, *e.Intercept, 0.01*abs(x[2]))
	assert.False(t, e.Completeness.Judged)
	assert.Equal(t, 0.5, doc.Settings["kernel_width"])
	assert.Equal(t, 512.0, doc.Settings["coalitions"])
}

func TestExplainOcclusionWelds(t *testing.T) {
	// Occlusion of the welds demo's sample by non-overlapping 8×8 windows
	// (stride 8): each pixel is covered by one window, so every pixel of a
	// window carries that window's drop (Zeiler & Fergus 2014, §4.2).
	doc := perturbRun(t, "-demo", "welds", "-method", "occlusion", "-window", "8x8", "-stride", "8", "-baseline", "mean")
	e := doc.Explanations[0]
	require.Len(t, e.Attributions, 1024)
	for wy := 0; wy < 4; wy++ {
		for wx := 0; wx < 4; wx++ {
			first := e.Attributions[wy*8*32+wx*8]
			for y := wy * 8; y < wy*8+8; y++ {
				for xx := wx * 8; xx < wx*8+8; xx++ {
					require.Equal(t, first, e.Attributions[y*32+xx], "window %d,%d", wy, wx)
				}
			}
		}
	}
	assert.Equal(t, []any{8.0, 8.0}, doc.Settings["window"])
	assert.Equal(t, 8.0, doc.Settings["stride"])
}

func TestExplainGroupsFromImages(t *testing.T) {
	// -superpixels and -patch make the groups of any method. Integrated
	// gradients sum over the segments, and the segment sums add up to the
	// pixel sum (additivity of the sum, common practice); Shapley values
	// play the patches as players, and are efficient over them (Shapley
	// 1953).
	doc := perturbRun(t, "-demo", "welds", "-superpixels", "64", "-steps", "16", "-allow-incomplete")
	e := doc.Explanations[0]
	require.NotNil(t, e.Groups)
	assert.InDelta(t, 64, len(e.Groups.Names), 0.2*64)
	require.Len(t, e.Groups.Segments, 1024)
	sums := make([]float64, len(e.Groups.Names))
	for p, l := range e.Groups.Segments {
		sums[l] += e.Attributions[p]
	}
	assertClose(t, sums, e.Groups.Attributions, "segment sums")
	assert.Equal(t, "segment 0", e.Groups.Names[0])
	assert.Equal(t, 64.0, doc.Settings["superpixels"])
	assert.Equal(t, 10.0, doc.Settings["compactness"])

	doc = perturbRun(t, "-demo", "welds", "-method", "shapley", "-patch", "8x8", "-reference-rows", "4",
		"-estimator", "permutation", "-coalitions", "120")
	e = doc.Explanations[0]
	require.NotNil(t, e.Groups)
	assert.Len(t, e.Groups.Names, 16)
	assert.Equal(t, "patch 0,0", e.Groups.Names[0])
	assert.Len(t, e.Groups.StandardErrors, 16)
	assert.True(t, e.Completeness.OK)
	assert.InDelta(t, e.Completeness.Expected, sum(e.Groups.Attributions), 1e-9)
	assert.Equal(t, "8x8", doc.Settings["patch"])
	assert.Equal(t, 16.0, doc.Settings["groups"])
}

func TestExplainPerturbationUsageErrors(t *testing.T) {
	// Settings that cannot apply are usage errors that name the flags
	// (common practice: a typo must not silently drop a setting).
	model, _, _, xpb := softmaxCase(t)
	g := filepath.Join(t.TempDir(), "groups.json")
	require.NoError(t, os.WriteFile(g, []byte(`[{"name":"a","indices":[0,1]}]`), 0o644))
	for _, c := range []struct {
		args []string
		says string
	}{
		{[]string{"-method", "shapley", "-reference", xpb, "-window", "2x2"}, "-window applies to -method occlusion only, not shapley"},
		{[]string{"-method", "occlusion", "-coalitions", "10"}, "-coalitions applies to -method shapley and surrogate only, not occlusion"},
		{[]string{"-method", "shapley", "-reference", xpb, "-estimator", "kernel"}, `-estimator must be auto, exact, regression or permutation, got "kernel"`},
		{[]string{"-method", "shapley", "-reference", xpb, "-reference-rows", "0"}, `-reference-rows must be a whole number from 1 to`},
		{[]string{"-method", "occlusion", "-window", "4"}, "-window: expected a size HxW in pixels"},
		{[]string{"-compactness", "5"}, "-compactness applies to -superpixels only"},
		{[]string{"-superpixels", "4"}, "-superpixels needs samples with at least two axes (height, width), got shape [3]"},
		{[]string{"-patch", "2x2"}, "-patch 2x2 needs samples with at least two axes"},
		{[]string{"-method", "shapley"}, "-method shapley needs -reference"},
		{[]string{"-method", "occlusion", "-groups", g}, "each feature must be in exactly one group"},
	} {
		code, _, errs := cli(t, append([]string{"explain", "-model", model, "-input", xpb}, c.args...)...)
		if c.args[len(c.args)-2] == "-groups" {
			assert.Equal(t, exitFail, code, "%q: %s", c.args, errs) // the file's content is wrong, not the flags
		} else {
			assert.Equal(t, exitUsage, code, "%q: %s", c.args, errs)
		}
		assert.Contains(t, errs, c.says, "%q", c.args)
	}
	code, _, errs := cli(t, "explain", "-demo", "welds", "-superpixels", "8", "-patch", "4x4")
	assert.Equal(t, exitUsage, code)
	assert.Contains(t, errs, "-patch and -superpixels both make the groups")
	code, _, errs = cli(t, "explain", "-demo", "welds", "-method", "occlusion", "-superpixels", "8", "-window", "2x2")
	assert.Equal(t, exitUsage, code)
	assert.Contains(t, errs, "-window moves over the image without groups")
}

func TestSummarizeShapley(t *testing.T) {
	// summarize takes the new methods with explain's flags, and records
	// their settings: the pumps demo's held-out rows by Shapley values
	// (permutations, 10 reference rows), whose efficiency makes every
	// row's attributions sum to f(x) − mean_r f(r) ≤ 1 in probability, so
	// each feature's mean |attribution| is at most 1 (Shapley 1953, a
	// bound, not a value).
	code, out, errs := cli(t, "summarize", "-format", "json", "-method", "shapley", "-estimator", "permutation",
		"-coalitions", "28", "-reference-rows", "10", "-bootstrap", "20")
	require.Equal(t, exitOK, code, errs)
	doc := decodeJSON(t, out)
	assert.Equal(t, "shapley", doc["method"])
	settings := doc["settings"].(map[string]any)
	assert.Equal(t, "permutation", settings["estimator"])
	assert.Equal(t, 10.0, settings["reference_rows"])
	assert.Equal(t, 500.0, doc["rows"])
	overall := doc["overall"].(map[string]any)
	for _, f := range overall["features"].([]any) {
		m := f.(map[string]any)["mean_abs"].(float64)
		assert.LessOrEqual(t, m, 1.0)
		assert.GreaterOrEqual(t, m, 0.0)
	}
}
