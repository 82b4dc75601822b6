package demo_test

import (
	"fmt"

	"github.com/apportion/apportion/demo"
)

// The scenarios and the files each one embeds.
func ExampleGet() {
	for _, name := range demo.Names() {
		s, err := demo.Get(name)
		if err != nil {
			fmt.Println(err)
			return
		}
		fmt.Printf("%s: %s, sample %s (%s), reference %s\n", s.Name, s.ModelFile, s.SampleFile, s.SampleClass, s.ReferenceFile)
	}
	// Output:
	// pumps: pumps.onnx, sample pumps_sample.json (failing), reference pumps_reference.csv
	// tickets: tickets.onnx, sample tickets_sample.txt (urgent), reference tickets_reference.txt
	// welds: welds.onnx, sample welds_sample.json (defective), reference welds_reference.npy
}
