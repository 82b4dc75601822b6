package gradattr_test

import (
	"bytes"
	"context"
	"encoding/csv"
	"strconv"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// pumpsRows reads the embedded pumps_test.csv: the 8 feature columns, in
// the model's input order, and the pump_line column.
func pumpsRows(t *testing.T) (features []string, rows [][]float64, lines []string) {
	t.Helper()
	raw, err := demo.File("pumps_test.csv")
	require.NoError(t, err)
	recs, err := csv.NewReader(bytes.NewReader(raw)).ReadAll()
	require.NoError(t, err)
	require.Greater(t, len(recs), 1)
	features = recs[0][:8]
	require.Equal(t, "pump_line", recs[0][8])
	for _, r := range recs[1:] {
		x := make([]float64, 8)
		for j := range x {
			x[j], err = strconv.ParseFloat(r[j], 64)
			require.NoError(t, err)
		}
		rows = append(rows, x)
		lines = append(lines, r[8])
	}
	return features, rows, lines
}

// pumpsHead compiles the embedded pumps model's output (class
// probabilities).
func pumpsHead(t *testing.T) *nn.Head {
	t.Helper()
	s, err := demo.Get("pumps")
	require.NoError(t, err)
	m, err := onnxlite.Decode(bytes.NewReader(s.Model), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	nw, err := nn.Compile(m, nn.Options{})
	require.NoError(t, err)
	h, err := nw.Head(nn.Selection{})
	require.NoError(t, err)
	return h
}

// TestPumpsSummaryRanksRuleFeatures summarises integrated gradients of the
// predicted class over the 500 held-out pumps, against the mean of the
// reference set (the first 200 normal training pumps) as baseline, and
// checks that the three features of the generating rule rank first by mean
// |attribution|.
//
// Source: the documented labelling rule of the invented data
// (demo/data/README.md: s = 0.5·(vibration_rms − 3) +
// 0.08·(bearing_temp − 65) + 0.0004·(hours_since_service − 3000); no
// other feature enters the label).
func TestPumpsSummaryRanksRuleFeatures(t *testing.T) {
	features, rows, lines := pumpsRows(t)
	h := pumpsHead(t)
	ref := pumpsReference(t)
	base := gradattr.Baseline{Kind: gradattr.BaselineMean, Reference: ref}

	opt := gradattr.IGOptions{Points: 32, Baselines: []gradattr.Baseline{base}}
	attrs := make([][]float64, len(rows))
	errs := make([]error, len(rows))
	var wg sync.WaitGroup
	next := make(chan int)
	for w := 0; w < 4; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range next {
				r, err := gradattr.IntegratedGradients(context.Background(), h, rows[i], gradattr.TargetTop, opt)
				if err == nil {
					attrs[i] = r.Attributions
				}
				errs[i] = err
			}
		}()
	}
	for i := range rows {
		next <- i
	}
	close(next)
	wg.Wait()

	s, err := gradattr.NewSummary(gradattr.SummaryOptions{Features: features, Method: "integrated-gradients", GroupBy: "pump_line", Seed: 1})
	require.NoError(t, err)
	for i := range rows {
		require.NoError(t, errs[i], "row %d", i)
		require.NoError(t, s.Add(uint64(i), lines[i], attrs[i]))
	}
	require.Equal(t, len(rows), s.Rows())

	ranked := s.Overall().Ranked()
	for _, f := range ranked {
		t.Logf("%-20s mean|a| %.4f [%.4f, %.4f]  mean a %+.4f [%+.4f, %+.4f]", f.Feature, f.MeanAbs, f.MeanAbsLo, f.MeanAbsHi, f.Mean, f.MeanLo, f.MeanHi)
	}
	top := map[string]bool{}
	for _, f := range ranked[:3] {
		top[f.Feature] = true
	}
	// The generating rule (demo/data/README.md) uses exactly these.
	assert.Equal(t, map[string]bool{"vibration_rms": true, "bearing_temp": true, "hours_since_service": true}, top)
	// And the separation is beyond the bootstrap noise: the lowest interval
	// end of a rule feature lies above the highest of every other feature.
	othersHi := 0.0
	for _, f := range ranked[3:] {
		othersHi = max(othersHi, f.MeanAbsHi)
	}
	assert.Greater(t, min(ranked[0].MeanAbsLo, ranked[1].MeanAbsLo, ranked[2].MeanAbsLo), othersHi)
	for _, g := range s.Groups() {
		t.Logf("line %s (%d rows): first %s, %s, %s", g.Name, g.Rows, g.Ranked()[0].Feature, g.Ranked()[1].Feature, g.Ranked()[2].Feature)
	}
}

// pumpsReference reads pumps_reference.csv (header of 8 feature names).
func pumpsReference(t *testing.T) [][]float64 {
	t.Helper()
	raw, err := demo.File("pumps_reference.csv")
	require.NoError(t, err)
	recs, err := csv.NewReader(bytes.NewReader(raw)).ReadAll()
	require.NoError(t, err)
	var out [][]float64
	for _, r := range recs[1:] {
		x := make([]float64, len(r))
		for j := range r {
			x[j], err = strconv.ParseFloat(r[j], 64)
			require.NoError(t, err)
		}
		out = append(out, x)
	}
	return out
}
