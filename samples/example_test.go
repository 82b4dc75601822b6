package samples_test

import (
	"fmt"
	"strings"

	"github.com/apportion/apportion/samples"
)

// Reading a CSV file of two samples for a model input of shape [batch, 3]
// whose features are named: the columns are matched by the header, so their
// order in the file and the extra column do not matter, and a bad row costs
// only itself.
func ExampleRead() {
	spec := samples.Spec{Name: "sensors", Shape: []int{-1, 3}, HasShape: true}
	file := "pump,flow,temp,rpm\n" +
		"A,145.5,77.2,1450\n" +
		"B,n/a,61.0,1480\n" +
		"C,120.0,65.3,1475\n"
	b, err := samples.Read(strings.NewReader(file), "rows.csv", spec, samples.Options{
		Features: []string{"temp", "rpm", "flow"},
		KeepBad:  true,
	})
	if err != nil {
		fmt.Println(err)
		return
	}
	for i := 0; i < b.Samples; i++ {
		if err := b.Bad[i]; err != nil {
			fmt.Println(i, err)
			continue
		}
		fmt.Println(i, b.Sample(i))
	}
	// Output:
	// 0 [77.2 1450 145.5]
	// 1 line 3, column flow: "n/a" is not a number
	// 2 [65.3 1475 120]
}
