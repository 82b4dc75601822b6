package render_test

import (
	"fmt"
	"os"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/render"
)

// A summary of four rows of attributions to two invented pump readings,
// ranked by mean |attribution| (by hand: bearing_temp (0.4+0.5+0.3+0.6)/4 =
// 0.45, flow (0.1+0.1+0.05+0)/4 = 0.0625), with bootstrap intervals and the
// bar of the command line's table.
func ExampleSummaryTable() {
	s, err := gradattr.NewSummary(gradattr.SummaryOptions{
		Features: []string{"flow", "bearing_temp"}, Model: "f249ba2ff4d7b157",
		Method: gradattr.MethodIntegratedGradients, Bootstrap: 50,
	})
	if err != nil {
		fmt.Println(err)
		return
	}
	for key, a := range [][]float64{{0.1, 0.4}, {-0.1, 0.5}, {0.05, 0.3}, {0.0, 0.6}} {
		if err := s.Add(uint64(key), "", a); err != nil {
			fmt.Println(err)
			return
		}
	}
	render.SummaryTable(os.Stdout, s, "pumps.onnx")
	// Output:
	// model pumps.onnx (sha256 f249ba2ff4d7…)  method integrated-gradients
	// 4 rows summarised, 0 skipped; 95% intervals from 50 Poisson bootstrap replicates (seed 0)
	//
	// all rows (4 rows)
	//   feature       mean |a|  95% interval      mean a  95% interval
	//   bearing_temp      0.45  [  0.375, 0.55]    +0.45  [+0.375,  +0.55]  ████████████
	//   flow            0.0625  [0.03067,  0.1]  +0.0125  [ -0.05, +0.085]  █▋
	//
	// (a full bar is a mean |a| of 0.45, the largest of any group)
}
