package render

import (
	"bytes"
	"image"
	"image/png"
	"math"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/fidelity"
)

func TestDark2IsColorBrewers(t *testing.T) {
	// Debian's python3-matplotlib 3.6.3 carries ColorBrewer's schemes
	// (matplotlib/_cm.py, "_Dark2_data": the 8-class Dark2 as RGB
	// fractions).
	classes := matplotlibScheme(t, "Dark2")
	require.Len(t, classes, len(Dark2))
	for i, c := range Dark2 {
		assert.Equal(t, classes[i], [3]int{int(c.R), int(c.G), int(c.B)}, "class %d", i+1)
	}
}

// assessReport is a report of two methods over four steps, written out by
// hand.
func assessReport() *fidelity.Report {
	iv := func(m, h float64) *fidelity.Interval { return &fidelity.Interval{Mean: m, Lo: m - h, Hi: m + h, N: 5} }
	return &fidelity.Report{
		Samples: 5, Skipped: []fidelity.Skipped{{Index: 7, Error: "line 9: not a number"}},
		Metrics:   fidelity.Metrics(),
		Fractions: []float64{0, 0.25, 0.5, 0.75, 1},
		Random: &fidelity.Random{Deletion: iv(0.5, 0.05), Insertion: iv(0.55, 0.04),
			DeletionCurve: []float64{1, 0.75, 0.5, 0.25, 0}, InsertionCurve: []float64{0, 0.25, 0.5, 0.75, 1}},
		Layers: []string{"dense1", "dense2"},
		Methods: []fidelity.MethodScores{
			{Method: "integrated-gradients", Title: "integrated gradients",
				Deletion: iv(0.125, 0.02), Insertion: iv(0.875, 0.01), DeletionBeyondRandom: 4, InsertionBeyondRandom: 5,
				DeletionCurve: []float64{1, 0, 0, 0, 0}, InsertionCurve: []float64{0, 1, 1, 1, 1},
				InfidelityGaussian: iv(0.0012, 0.0003), InfidelityBaseline: iv(0.03, 0.01), Sensitivity: iv(0.02, 0.007),
				Randomization: []fidelity.RandomizationScores{{Depth: 1, Layer: "dense2", Spearman: iv(0.25, 0.1)}, {Depth: 2, Layer: "dense1", Spearman: iv(-0.5, 0.2)}},
				Completeness:  &fidelity.Share{Passed: 5, Judged: 5}},
			{Method: "gradient", Title: "gradient", Failed: []fidelity.Skipped{{Index: 3, Error: "model failed"}},
				Deletion: iv(0.5, 0.1), Insertion: iv(0.5, 0.1),
				DeletionCurve: []float64{1, 1, 1, 0.5, 0}, InsertionCurve: []float64{0, 0, 0.5, 1, 1},
				Randomization: []fidelity.RandomizationScores{{Depth: 1, Layer: "dense2", Spearman: iv(0.75, 0.1)}, {Depth: 2, Layer: "dense1", Spearman: iv(0.5, 0.2)}}},
		},
		Settings: fidelity.Settings{Seed: 3, Units: 4, Steps: 4, RandomOrders: 20, Draws: 32, SensitivityDraws: 8, Noise: 0.1, Radius: 0.05},
	}
}

// The table holds one row per method and one for the random orders, each
// score as mean ± half-width of its interval, the samples beyond random
// orders as [k/n], "—" where a method has no score, the randomization
// layer by layer from the output down, and the failures.
func TestAssessTable(t *testing.T) {
	var b bytes.Buffer
	require.NoError(t, AssessTable(&b, assessReport(), "model on samples"))
	out := b.String()
	lines := strings.Split(out, "\n")
	find := func(prefix string) string {
		for _, l := range lines {
			if strings.HasPrefix(strings.TrimSpace(l), prefix) {
				return l
			}
		}
		t.Fatalf("no line starts with %q in\n%s", prefix, out)
		return ""
	}
	assert.Contains(t, lines[1], "5 samples scored, 1 sample skipped")
	ig := strings.Fields(find("integrated gradients"))
	assert.Equal(t, []string{"integrated", "gradients", "0.125", "±", "0.02", "[4/5]", "0.875", "±", "0.01", "[5/5]",
		"0.0012", "±", "0.0003", "0.03", "±", "0.01", "0.02", "±", "0.007", "−0.5", "±", "0.2", "5", "of", "5"}, ig)
	grad := strings.Fields(find("gradient  "))
	assert.Equal(t, []string{"—", "—", "—", "0.5", "±", "0.2", "—"}, grad[len(grad)-7:])
	assert.Equal(t, []string{"random", "order", "0.5", "±", "0.05", "0.55", "±", "0.04"}, strings.Fields(find("random order")))
	assert.Equal(t, []string{"method", "to", "dense2", "to", "dense1"}, strings.Fields(lines[indexOf(lines, "Randomization:")+1]))
	assert.Contains(t, out, "gradient failed on 1 sample: sample 3: model failed")
}

func indexOf(lines []string, prefix string) int {
	for i, l := range lines {
		if strings.HasPrefix(l, prefix) {
			return i
		}
	}
	return -1
}

// The PNG draws each method's curves in its Dark2 colour through the
// report's points: at the top left of the deletion panel every curve
// starts at output 1, and integrated gradients' insertion curve reaches 1
// at a quarter of the features; the randomization panel marks each depth.
func TestAssessPNG(t *testing.T) {
	var b bytes.Buffer
	rep := assessReport()
	require.NoError(t, AssessPNG(&b, rep, "model on samples"))
	img, err := png.Decode(&b)
	require.NoError(t, err)
	rgba, ok := img.(*image.RGBA)
	require.True(t, ok)
	// The layout: the title's two lines, then the panels from the left.
	top := pngMargin + 2*pngLine + pngLine + 10
	pad := 0.04
	del := plotPanel{x0: assessLeft + pngMargin, y0: top, xlo: 0, xhi: 1, ylo: -pad, yhi: 1 + pad}
	ins := del
	ins.x0 += assessPanelW + assessGap
	near := func(p plotPanel, x, y float64, k int, what string) {
		t.Helper()
		px, py := int(math.Floor(p.px(x))), int(math.Floor(p.py(y)))
		want := Dark2[k]
		found := false
		for dy := -2; dy <= 2 && !found; dy++ {
			for dx := -2; dx <= 2 && !found; dx++ {
				found = rgba.RGBAAt(px+dx, py+dy) == want
			}
		}
		assert.True(t, found, "%s: no pixel of %v near (%d, %d)", what, want, px, py)
	}
	near(ins, 0.25, 1, 0, "integrated gradients' insertion at 0.25")
	near(del, 0.5, 1, 1, "gradient's deletion at 0.5")
	near(ins, 0.5, 0.5, 1, "gradient's insertion at 0.5")
	rnd := rep.Methods[0].Randomization
	rp := plotPanel{x0: ins.x0 + assessPanelW + assessGap, y0: top, xlo: -0.3, xhi: 2.3, ylo: -1.05, yhi: 1.05}
	near(rp, 2-0.03, rnd[1].Spearman.Mean, 0, "integrated gradients after two layers")
	assert.Equal(t, rp.x0+assessPanelW+pngMargin, rgba.Bounds().Dx(), "width")
}
