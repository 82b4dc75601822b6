package main

import (
	"bytes"
	"encoding/csv"
	"fmt"
	"math"
	"math/rand/v2"
	"strconv"
)

// The pumps scenario is invented: condition monitoring of centrifugal pumps
// on three production lines. Every number below is made up for the demo.

// pumpFeatures are the model's inputs, in input order, with their units.
var pumpFeatures = []struct{ Name, Unit string }{
	{"bearing_temp", "°C"},
	{"vibration_rms", "mm/s"},
	{"discharge_pressure", "bar"},
	{"suction_pressure", "bar"},
	{"flow", "m³/h"},
	{"motor_current", "A"},
	{"hours_since_service", "h"},
	{"ambient_temp", "°C"},
}

// pumpClasses are the model's outputs, in output order.
var pumpClasses = []string{"normal", "degraded", "failing"}

// pumpLines are the production lines; the model does not see the line.
var pumpLines = []string{"A", "B", "C"}

// Sizes of the pumps data set: the first pumpTrainRows rows train the model,
// the last pumpTestRows are held out.
const (
	pumpRows      = 3000
	pumpTestRows  = 500
	pumpTrainRows = pumpRows - pumpTestRows
	pumpRefRows   = 200
)

// pumpRow is one invented pump reading.
type pumpRow struct {
	X     [8]float64 // in pumpFeatures order
	Line  string
	Label int // index into pumpClasses
}

// pumpScore is the hidden condition score. It uses only vibration_rms,
// bearing_temp and hours_since_service; the other five inputs never enter
// the label:
//
//	s = 0.5·(vibration_rms − 3) + 0.08·(bearing_temp − 65) + 0.0004·(hours_since_service − 3000)
//
// normal when s < 0.6, degraded when 0.6 ≤ s < 2.3, failing when s ≥ 2.3.
func pumpScore(bearingTemp, vibration, hours float64) float64 {
	return 0.5*(vibration-3) + 0.08*(bearingTemp-65) + 0.0004*(hours-3000)
}

// pumpLabel maps a score to a class index.
func pumpLabel(s float64) int {
	switch {
	case s < 0.6:
		return 0
	case s < 2.3:
		return 1
	default:
		return 2
	}
}

// roundTo rounds v to d decimals, so that the CSV text is the exact data.
func roundTo(v float64, d int) float64 {
	p := math.Pow(10, float64(d))
	return math.Round(v*p) / p
}

// pumpDecimals is the number of decimals each feature is kept to.
var pumpDecimals = [8]int{1, 2, 2, 2, 1, 1, 0, 1}

// generatePumps draws the invented pumps data set from seed. A latent wear
// level drives vibration, bearing temperature, hours since service and (as a
// distractor) motor current; line C runs 4 °C hotter. The rows are a pure
// function of seed.
func generatePumps(seed uint64) []pumpRow {
	rng := rand.New(rand.NewPCG(seed, 0x70756d7073)) // stream "pumps"
	rows := make([]pumpRow, pumpRows)
	for i := range rows {
		line := rng.IntN(3)
		wear := math.Pow(rng.Float64(), 1.6) // more healthy pumps than worn ones
		ambient := 21 + 6*rng.NormFloat64()
		hours := math.Max(0, 2200+4200*wear+900*rng.NormFloat64())
		vibration := math.Max(0.4, 1.8+5.5*wear*wear+0.6*rng.NormFloat64())
		bearing := ambient + 34 + 22*wear + 3.5*rng.NormFloat64()
		if line == 2 {
			bearing += 4
		}
		suction := math.Max(0.2, 1.3+0.25*rng.NormFloat64())
		flow := math.Max(20, 120+22*rng.NormFloat64())
		discharge := suction + 8.4 - 0.0002*flow*flow + 0.3*rng.NormFloat64()
		current := 18 + 0.13*flow + 4*wear + 1.5*rng.NormFloat64()

		x := [8]float64{bearing, vibration, discharge, suction, flow, current, hours, ambient}
		for j := range x {
			x[j] = roundTo(x[j], pumpDecimals[j])
		}
		rows[i] = pumpRow{
			X:     x,
			Line:  pumpLines[line],
			Label: pumpLabel(pumpScore(x[0], x[1], x[6])),
		}
	}
	return rows
}

// pumpReference returns the first pumpRefRows normal rows of the training
// part: the reference population for mean baselines and expected gradients.
func pumpReference(rows []pumpRow) []pumpRow {
	var ref []pumpRow
	for _, r := range rows[:pumpTrainRows] {
		if r.Label == 0 {
			ref = append(ref, r)
			if len(ref) == pumpRefRows {
				break
			}
		}
	}
	return ref
}

// The demo's sample is classed failing with a probability in
// [sampleMinProb, sampleMaxProb]: confident, and not saturated, so that the
// methods that read the gradient at the sample itself (the gradient,
// gradient × input, SmoothGrad) find one.
const (
	sampleMinProb = 0.9
	sampleMaxProb = 0.99
)

// pumpSample returns the demo's one sample to explain: the first held-out
// failing row that the model, whose class probabilities prob gives, classes
// failing with a probability between sampleMinProb and sampleMaxProb.
func pumpSample(rows []pumpRow, prob func(x []float64) []float64) (pumpRow, error) {
	for _, r := range rows[pumpTrainRows:] {
		if p := prob(r.X[:])[2]; r.Label == 2 && p >= sampleMinProb && p <= sampleMaxProb {
			return r, nil
		}
	}
	return pumpRow{}, fmt.Errorf("pumps: no failing held-out row classed failing with a probability in [%v, %v]", sampleMinProb, sampleMaxProb)
}

// formatFloat writes v in the shortest form that reads back exactly.
func formatFloat(v float64) string { return strconv.FormatFloat(v, 'f', -1, 64) }

// pumpCSV renders rows as CSV: a header with the feature names, then the
// features; withLine adds the pump_line and label columns.
func pumpCSV(rows []pumpRow, withLine bool) ([]byte, error) {
	var b bytes.Buffer
	w := csv.NewWriter(&b)
	header := make([]string, 0, 10)
	for _, f := range pumpFeatures {
		header = append(header, f.Name)
	}
	if withLine {
		header = append(header, "pump_line", "label")
	}
	if err := w.Write(header); err != nil {
		return nil, err
	}
	for _, r := range rows {
		rec := make([]string, 0, 10)
		for _, v := range r.X {
			rec = append(rec, formatFloat(v))
		}
		if withLine {
			rec = append(rec, r.Line, pumpClasses[r.Label])
		}
		if err := w.Write(rec); err != nil {
			return nil, err
		}
	}
	w.Flush()
	return b.Bytes(), w.Error()
}

// classCounts counts the labels of rows.
func classCounts(labels []int, k int) []int {
	c := make([]int, k)
	for _, l := range labels {
		c[l]++
	}
	return c
}
