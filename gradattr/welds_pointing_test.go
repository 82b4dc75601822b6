package gradattr_test

import (
	"bytes"
	"context"
	"fmt"
	"math"
	"os"
	"strings"
	"sync"
	"testing"
	"time"

	"codeberg.org/sbinet/npyio/npy"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// The welds demo ships ground-truth defect masks with its held-out patches,
// which lets the attributions be checked against something the model never
// saw: where the defect is.

// readNPY reads an embedded .npy file of the welds demo into a slice of T
// and returns it with its shape.
func readNPY[T any](t *testing.T, name string) ([]T, []int) {
	t.Helper()
	raw, err := demo.File(name)
	require.NoError(t, err)
	r, err := npy.NewReader(bytes.NewReader(raw))
	require.NoError(t, err, name)
	var data []T
	require.NoError(t, r.Read(&data), name)
	return data, r.Header.Descr.Shape
}

// weldsHead compiles the welds demo model (float32) and returns its
// "verdict" output, the softmax probabilities of clean and defective.
func weldsHead(t *testing.T) gradattr.Model {
	t.Helper()
	s, err := demo.Get("welds")
	require.NoError(t, err)
	m, err := onnxlite.Decode(bytes.NewReader(s.Model), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	nw, err := nn.Compile(m, nn.Options{})
	require.NoError(t, err)
	h, err := nw.Head(nn.Selection{Output: "verdict"})
	require.NoError(t, err)
	return h
}

// pointingStats is the outcome of the pointing game over a set of patches.
type pointingStats struct {
	patches, hits   int
	kindN, kindHits [3]int  // by defect kind: 1 crack, 2 porosity
	posIn, posAll   float64 // Σ positive attribution inside the masks, and in all
	maskPx, allPx   int     // mask pixels, and all pixels
	completeOK      int     // patches whose completeness check passed
	worstGap, sumGp float64 // largest and summed relative completeness gap
}

func (s *pointingStats) hitRate() float64   { return float64(s.hits) / float64(s.patches) }
func (s *pointingStats) posShare() float64  { return s.posIn / s.posAll }
func (s *pointingStats) areaShare() float64 { return float64(s.maskPx) / float64(s.allPx) }
func (s *pointingStats) meanGap() float64   { return s.sumGp / float64(s.patches) }

// TestWeldsPointingGame plays the pointing game of Zhang et al. 2018
// ("Top-down neural attention by excitation backprop", IJCV): a patch is a
// hit when the pixel of largest attribution lies inside the ground-truth
// region. The paper allows a tolerance of 15 pixels around the region (the
// value from memory); these patches are 32 pixels wide, so that would
// cover most of the seam, and the game here uses a tolerance of 0 pixels:
// the maximum of the signed attribution must be a defect-mask pixel itself.
//
// Integrated gradients (Sundararajan et al. 2017, eq. 1) explain the
// "defective" probability of every defective held-out patch, with two
// baselines: the zero ("black") patch of the paper, and the mean of the 32
// clean reference patches, which keeps the plate and the seam and so asks
// "what differs from a clean weld" (Sturmfels et al. 2020 discuss how the
// baseline decides what an attribution can see). The zero baseline is
// darker than every defect, and a defect darkens the seam, so x − x′ is
// smallest exactly at the defect pixels; the mean clean patch has the seam's
// brightness there, and x − x′ < 0 marks the darkening. The hit rate is
// checked for the mean clean baseline, and reported for both.
//
// Besides hits, the share of positive attribution inside the masks,
// Σ_{i∈mask} max(a_i, 0) / Σ_i max(a_i, 0), is compared with the masks'
// share of the pixels: an attribution that ignored the defect would put
// about the area share there (the chance level).
func TestWeldsPointingGame(t *testing.T) {
	if testing.Short() {
		t.Skip("explains 82 patches twice (about 15 s on 2 cores)")
	}
	patches, pshape := readNPY[float32](t, "welds_test_patches.npy")
	masks, mshape := readNPY[uint8](t, "welds_test_masks.npy")
	labels, lshape := readNPY[int64](t, "welds_test_labels.npy")
	ref, rshape := readNPY[float32](t, "welds_reference.npy")
	// Shapes as documented in demo/data/README.md.
	require.Equal(t, []int{200, 1, 32, 32}, pshape)
	require.Equal(t, []int{200, 32, 32}, mshape)
	require.Equal(t, []int{200, 2}, lshape)
	require.Equal(t, []int{32, 1, 32, 32}, rshape)
	const px = 32 * 32

	refRows := make([][]float64, rshape[0])
	for i := range refRows {
		refRows[i] = make([]float64, px)
		for j := range refRows[i] {
			refRows[i][j] = float64(ref[i*px+j])
		}
	}
	var defective []int
	for i := 0; i < lshape[0]; i++ {
		if labels[2*i] == 1 {
			defective = append(defective, i)
		}
	}
	// 38 crack + 44 porosity patches (demo/data/README.md).
	require.Len(t, defective, 82)

	probs := weldsHead(t)
	type variant struct {
		name     string
		head     gradattr.Model
		baseline gradattr.Baseline
	}
	variants := []variant{
		{"mean clean", probs, gradattr.Baseline{Kind: gradattr.BaselineMean, Reference: refRows}},
		{"zero", probs, gradattr.Baseline{Kind: gradattr.BaselineZero}},
	}
	const (
		target = 1 // "defective" (class_names metadata)
		points = 32
	)
	start := time.Now()
	stats := map[string]*pointingStats{}
	for _, v := range variants {
		name, head, b := v.name, v.head, v.baseline
		st := &pointingStats{}
		stats[name] = st
		var mu sync.Mutex
		var wg sync.WaitGroup
		work := make(chan int)
		errs := make(chan error, len(defective))
		for w := 0; w < 2; w++ {
			wg.Add(1)
			go func() {
				defer wg.Done()
				for idx := range work {
					x := make([]float64, px)
					for j := range x {
						x[j] = float64(patches[idx*px+j])
					}
					res, err := gradattr.IntegratedGradients(context.Background(), head, x, target, gradattr.IGOptions{
						Rule: gradattr.RuleGaussLegendre, Points: points, Tolerance: 0.05,
						Baselines: []gradattr.Baseline{b},
					})
					if err != nil {
						errs <- err
						continue
					}
					mask := masks[idx*px : (idx+1)*px]
					best := 0
					var in, all float64
					area := 0
					for j, a := range res.Attributions {
						if a > res.Attributions[best] {
							best = j
						}
						if mask[j] != 0 {
							area++
						}
						if a > 0 {
							all += a
							if mask[j] != 0 {
								in += a
							}
						}
					}
					kind := labels[2*idx+1]
					mu.Lock()
					st.patches++
					st.kindN[kind]++
					if mask[best] != 0 {
						st.hits++
						st.kindHits[kind]++
					}
					st.posIn += in
					st.posAll += all
					st.maskPx += area
					st.allPx += px
					if res.Completeness.OK {
						st.completeOK++
					}
					st.worstGap = math.Max(st.worstGap, res.Completeness.RelativeGap)
					st.sumGp += res.Completeness.RelativeGap
					mu.Unlock()
				}
			}()
		}
		for _, idx := range defective {
			work <- idx
		}
		close(work)
		wg.Wait()
		close(errs)
		for err := range errs {
			require.NoError(t, err)
		}
		t.Logf("%-22s: pointing game %d/%d hits (%.3f; crack %d/%d, porosity %d/%d); positive attribution in masks %.3f vs mask area %.3f; completeness (Gauss–Legendre, %d points, tolerance 0.05) ok for %d/%d, mean relative gap %.4f, worst %.4f",
			name, st.hits, st.patches, st.hitRate(), st.kindHits[1], st.kindN[1], st.kindHits[2], st.kindN[2], st.posShare(), st.areaShare(), points, st.completeOK, st.patches, st.meanGap(), st.worstGap)
	}
	t.Logf("elapsed %v", time.Since(start).Round(time.Millisecond))

	mean := stats["mean clean"]
	require.Equal(t, len(defective), mean.patches)
	// Pointing game, Zhang et al. 2018: at least 80% of the defective
	// patches have their top attribution inside the defect mask (the 80%
	// bar is ours; chance is the mask's area share, checked below).
	assert.GreaterOrEqual(t, mean.hitRate(), 0.80, "pointing-game hit rate, mean clean baseline")
	// The masks hold several times more positive attribution than their
	// area (chance level: the area share).
	assert.Greater(t, mean.posShare(), 3*mean.areaShare(), "positive attribution share in masks vs area share")
	// Completeness, Sundararajan et al. 2017, Proposition 1: Σ a = f(x) − f(x′).
	assert.Less(t, mean.meanGap(), 0.05, "mean relative completeness gap")

	// The README's table reports these runs: its hits and completeness
	// failures are the ones computed here.
	readme, err := os.ReadFile("../README.md")
	require.NoError(t, err)
	for name, row := range map[string]string{"mean clean": "| mean clean patch |", "zero": "| zero (black) |"} {
		st := stats[name]
		i := strings.Index(string(readme), row)
		require.GreaterOrEqual(t, i, 0, "README row %q", row)
		cells := strings.Split(strings.SplitN(string(readme)[i:], "\n", 2)[0], "|")
		assert.Equal(t, fmt.Sprintf("%d/%d (%.0f%%)", st.hits, st.patches, 100*st.hitRate()), strings.TrimSpace(cells[2]), name)
		assert.Equal(t, fmt.Sprintf("%d/%d", st.patches-st.completeOK, st.patches), strings.TrimSpace(cells[7]), name)
	}
}
