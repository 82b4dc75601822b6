package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"math"
	"strconv"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/onnxlite"
)

// committed returns the embedded demo file name.
func committed(t *testing.T, name string) []byte {
	t.Helper()
	b, err := demo.File(name)
	require.NoError(t, err)
	return b
}

// TestPumpsDataReproduces regenerates the pumps data sets from the default
// seed and compares them with the committed files byte for byte (the
// committed files are the source of truth).
func TestPumpsDataReproduces(t *testing.T) {
	rows := generatePumps(defaultSeed)
	require.Len(t, rows, pumpRows)

	test, err := pumpCSV(rows[pumpTrainRows:], true)
	require.NoError(t, err)
	assert.Equal(t, committed(t, "pumps_test.csv"), test)

	ref := pumpReference(rows)
	require.Len(t, ref, pumpRefRows)
	refCSV, err := pumpCSV(ref, false)
	require.NoError(t, err)
	assert.Equal(t, committed(t, "pumps_reference.csv"), refCSV)

	// The sample is chosen by the model's probabilities: the committed
	// model's, run by the engine.
	m, err := explain.Decode(committed(t, "pumps.onnx"), "pumps.onnx", explain.DecodeOptions{})
	require.NoError(t, err)
	require.NoError(t, m.Compile(explain.CompileOptions{}))
	head, err := m.Head("", false)
	require.NoError(t, err)
	prob := func(x []float64) []float64 {
		p, err := head.Forward(context.Background(), x, 1)
		require.NoError(t, err)
		return p
	}
	s, err := pumpSample(rows, prob)
	require.NoError(t, err)
	p := prob(s.X[:])[2]
	assert.True(t, p >= sampleMinProb && p <= sampleMaxProb, "failing with probability %v", p)
	sample, err := jsonLine(s.X[:])
	require.NoError(t, err)
	assert.Equal(t, committed(t, "pumps_sample.json"), sample)

	// A different seed draws different data.
	other, err := pumpCSV(generatePumps(defaultSeed + 1)[pumpTrainRows:], true)
	require.NoError(t, err)
	assert.NotEqual(t, test, other)
}

// TestPumpsLabelRule checks the committed held-out labels against the
// documented hidden rule: thresholds 0.6 and 2.3 on
// s = 0.5·(vibration_rms − 3) + 0.08·(bearing_temp − 65) + 0.0004·(hours_since_service − 3000),
// computed here from the three CSV columns alone.
func TestPumpsLabelRule(t *testing.T) {
	recs, err := csv.NewReader(bytes.NewReader(committed(t, "pumps_test.csv"))).ReadAll()
	require.NoError(t, err)
	col := map[string]int{}
	for i, h := range recs[0] {
		col[h] = i
	}
	num := func(r []string, name string) float64 {
		v, err := strconv.ParseFloat(r[col[name]], 64)
		require.NoError(t, err)
		return v
	}
	hot := map[string][2]float64{} // line → sum, count of bearing_temp
	for _, r := range recs[1:] {
		s := 0.5*(num(r, "vibration_rms")-3) + 0.08*(num(r, "bearing_temp")-65) + 0.0004*(num(r, "hours_since_service")-3000)
		want := "failing"
		switch {
		case s < 0.6:
			want = "normal"
		case s < 2.3:
			want = "degraded"
		}
		assert.Equal(t, want, r[col["label"]], "row %v", r)
		h := hot[r[col["pump_line"]]]
		hot[r[col["pump_line"]]] = [2]float64{h[0] + num(r, "bearing_temp"), h[1] + 1}
	}
	// Line C runs hotter than lines A and B (by 4 °C in the generator).
	mean := func(l string) float64 { return hot[l][0] / hot[l][1] }
	assert.Greater(t, mean("C"), mean("A")+1)
	assert.Greater(t, mean("C"), mean("B")+1)
}

// TestWeldsDataReproduces regenerates the welds data sets from the default
// seed and compares them with the committed files byte for byte.
func TestWeldsDataReproduces(t *testing.T) {
	s := generateWelds(defaultSeed)
	for _, c := range []struct {
		name string
		make func() ([]byte, error)
	}{
		{"welds_test_patches.npy", func() ([]byte, error) { return weldPatchesNPY(s.Test) }},
		{"welds_test_masks.npy", func() ([]byte, error) { return weldMasksNPY(s.Test) }},
		{"welds_test_labels.npy", func() ([]byte, error) { return weldLabelsNPY(s.Test) }},
		{"welds_reference.npy", func() ([]byte, error) { return weldPatchesNPY(s.Reference) }},
		{"welds_sample.json", func() ([]byte, error) {
			p, err := weldSample(s)
			if err != nil {
				return nil, err
			}
			return weldSampleJSON(p)
		}},
	} {
		got, err := c.make()
		require.NoError(t, err, c.name)
		assert.True(t, bytes.Equal(committed(t, c.name), got), "%s differs from a regeneration with seed %d", c.name, defaultSeed)
	}
	for _, p := range s.Reference {
		assert.Equal(t, 0, p.Label)
	}
}

// TestCrossEntropyGradient checks the gradient gorgonia derives for the
// training loss against the closed form ∂L/∂z = (softmax(z) − y)/n
// (Goodfellow, Bengio and Courville 2016, eq. 6.30 with the mean over n
// rows) and against central finite differences.
func TestCrossEntropyGradient(t *testing.T) {
	const n, k = 4, 3
	z0 := []float64{0.3, -1.2, 2.0, 0.0, 0.5, -0.5, 1.5, 1.4, -2.0, -0.7, 0.1, 0.9}
	y0 := []float64{1, 0, 0, 0, 0, 1, 0, 1, 0, 0, 0, 1}

	loss := func(z []float64) (float64, []float64) {
		g := G.NewGraph()
		zn := G.NewMatrix(g, tensor.Float64, G.WithShape(n, k), G.WithName("z"),
			G.WithValue(tensor.New(tensor.WithShape(n, k), tensor.WithBacking(append([]float64(nil), z...)))))
		yn := G.NewMatrix(g, tensor.Float64, G.WithShape(n, k), G.WithName("y"),
			G.WithValue(tensor.New(tensor.WithShape(n, k), tensor.WithBacking(append([]float64(nil), y0...)))))
		cost, err := crossEntropy(zn, yn)
		require.NoError(t, err)
		grads, err := G.Grad(cost, zn)
		require.NoError(t, err)
		vm := G.NewTapeMachine(g)
		defer vm.Close()
		require.NoError(t, vm.RunAll())
		return cost.Value().Data().(float64), append([]float64(nil), grads[0].Value().Data().([]float64)...)
	}
	_, grad := loss(z0)
	const h = 1e-5
	for i := range z0 {
		r := i / k
		var s float64
		for j := range k {
			s += math.Exp(z0[r*k+j])
		}
		closed := (math.Exp(z0[i])/s - y0[i]) / n
		assert.InDelta(t, closed, grad[i], 1e-12, "closed form, element %d", i)

		zp := append([]float64(nil), z0...)
		zm := append([]float64(nil), z0...)
		zp[i] += h
		zm[i] -= h
		lp, _ := loss(zp)
		lm, _ := loss(zm)
		assert.InDelta(t, (lp-lm)/(2*h), grad[i], 1e-8, "central difference, element %d", i)
	}
}

// TestPumpsExportRoundTrip trains the pumps network briefly, exports it,
// and checks that onnxlite decodes every initializer as the float32
// rounding of the trained float64 weight (IEEE 754 round to nearest, bit
// for bit) and that the exported network predicts like the trained one.
func TestPumpsExportRoundTrip(t *testing.T) {
	rows := generatePumps(defaultSeed)
	x, labels := pumpsMatrix(rows[:pumpTrainRows])
	m, err := trainMLP(x, labels, pumpTrainRows, trainConfig{Epochs: 5, BatchSize: 50, LearnRate: 0.01, Seed: 7})
	require.NoError(t, err)
	model, err := pumpsModel(m)
	require.NoError(t, err)
	data, err := encodeModel(model)
	require.NoError(t, err)
	back, err := onnxlite.Decode(bytes.NewReader(data), onnxlite.DecodeOptions{})
	require.NoError(t, err)

	want := map[string][]float64{"feature_mean": m.Mean, "feature_std": m.Std}
	for l, L := range m.Layers {
		want["dense"+strconv.Itoa(l+1)+".weight"] = L.W
		want["dense"+strconv.Itoa(l+1)+".bias"] = L.B
	}
	require.Len(t, back.Graph.Initializers, len(want))
	for _, in := range back.Graph.Initializers {
		w, ok := want[in.Name]
		require.True(t, ok, in.Name)
		got := in.Data.([]float32)
		require.Len(t, got, len(w), in.Name)
		for i := range w {
			assert.Equal(t, math.Float32bits(float32(w[i])), math.Float32bits(got[i]), "%s[%d]", in.Name, i)
		}
	}

	// Five epochs already beat the majority class of the held-out rows.
	correct, counts := 0, make([]int, 3)
	for _, r := range rows[pumpTrainRows:] {
		counts[r.Label]++
		if m.predict(r.X[:]) == r.Label {
			correct++
		}
	}
	assert.Greater(t, correct, max(counts[0], counts[1], counts[2]))
}

func TestRunUsage(t *testing.T) {
	var out, errb bytes.Buffer
	assert.Equal(t, 2, run([]string{"-only", "turbines"}, &out, &errb))
	assert.Contains(t, errb.String(), "usage:")
	assert.Equal(t, 2, run([]string{"-nosuchflag"}, &out, &errb))
	assert.Equal(t, 2, run([]string{"extra"}, &out, &errb))
	assert.Empty(t, out.String())
}
