package gradattr_test

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"fmt"
	"sort"
	"strconv"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// Explaining the embedded pumps demo (an invented MLP that classes eight
// sensor readings as normal, degraded or failing) with integrated
// gradients from the mean of 200 normal pumps: which readings move its
// sample from "normal" to "failing"? Completeness says the attributions
// add up to p(failing | sample) − p(failing | mean normal pump). The three
// readings on top are the three the invented labelling rule uses.
func ExampleIntegratedGradients_pumps() {
	s, err := demo.Get("pumps")
	if err != nil {
		fmt.Println(err)
		return
	}
	m, err := onnxlite.Decode(bytes.NewReader(s.Model), onnxlite.DecodeOptions{})
	if err != nil {
		fmt.Println(err)
		return
	}
	nw, err := nn.Compile(m, nn.Options{}) // float32 engine
	if err != nil {
		fmt.Println(err)
		return
	}
	model, err := nw.Head(nn.Selection{}) // the class probabilities
	if err != nil {
		fmt.Println(err)
		return
	}
	var features, classes []string
	var x []float64
	if err := json.Unmarshal([]byte(m.Metadata["feature_names"]), &features); err != nil {
		fmt.Println(err)
		return
	}
	if err := json.Unmarshal([]byte(m.Metadata["class_names"]), &classes); err != nil {
		fmt.Println(err)
		return
	}
	if err := json.Unmarshal(s.Sample, &x); err != nil {
		fmt.Println(err)
		return
	}
	records, err := csv.NewReader(bytes.NewReader(s.Reference)).ReadAll()
	if err != nil {
		fmt.Println(err)
		return
	}
	var normal [][]float64
	for _, rec := range records[1:] { // the first record is the header
		row := make([]float64, len(rec))
		for i, f := range rec {
			if row[i], err = strconv.ParseFloat(f, 64); err != nil {
				fmt.Println(err)
				return
			}
		}
		normal = append(normal, row)
	}

	r, err := gradattr.IntegratedGradients(context.Background(), model, x, gradattr.TargetTop, gradattr.IGOptions{
		Tolerance: 0.001,
		Baselines: []gradattr.Baseline{{Kind: gradattr.BaselineMean, Reference: normal}},
	})
	if err != nil {
		fmt.Println(err)
		return
	}
	c := r.Completeness
	fmt.Printf("predicted %s: p = %.3f, %.3f at the baseline\n", classes[r.Target], r.Output, r.BaselineOutput)
	fmt.Printf("Σ attributions %.2f = f(x) − f(x′) %.2f within 0.1%%: %v\n", c.Sum, c.Expected, c.OK)
	order := make([]int, len(features))
	for i := range order {
		order[i] = i
	}
	sort.Slice(order, func(a, b int) bool { return r.Attributions[order[a]] > r.Attributions[order[b]] })
	for _, i := range order[:3] {
		fmt.Printf("%-20s %+.2f\n", features[i], r.Attributions[i])
	}
	// Output:
	// predicted failing: p = 0.969, 0.000 at the baseline
	// Σ attributions 0.97 = f(x) − f(x′) 0.97 within 0.1%: true
	// vibration_rms        +0.54
	// bearing_temp         +0.29
	// hours_since_service  +0.16
}
