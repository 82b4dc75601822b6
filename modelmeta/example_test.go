package modelmeta_test

import (
	"fmt"

	"github.com/apportion/apportion/modelmeta"
	"github.com/apportion/apportion/onnxlite"
)

// Naming the inputs and classes of a model exported from another framework
// (here a hand-built graph of one Softmax over three readings), so that
// apportion's tables, figures and documents use the names.
func ExampleWrite() {
	tensor := func(name string) *onnxlite.ValueInfo {
		return &onnxlite.ValueInfo{Name: name, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Float,
			HasShape: true, Shape: []onnxlite.Dim{{Param: "batch"}, {Value: 3, HasValue: true}}}}
	}
	m := &onnxlite.Model{Graph: &onnxlite.Graph{
		Inputs:  []*onnxlite.ValueInfo{tensor("readings")},
		Outputs: []*onnxlite.ValueInfo{tensor("condition")},
		Nodes:   []*onnxlite.Node{{OpType: "Softmax", Inputs: []string{"readings"}, Outputs: []string{"condition"}}},
	}}
	err := modelmeta.Write(m, modelmeta.Meta{
		Features: []string{"bearing_temp", "vibration_rms", "flow"},
		Units:    []string{"°C", "mm/s", "m³/h"},
		Classes:  []string{"normal", "degraded", "failing"},
	})
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Println(m.Metadata["feature_names"])
	meta := modelmeta.Read(m)
	fmt.Println(meta.Labels([]int{3}))
	fmt.Println(meta.Class(2))
	// Output:
	// ["bearing_temp","vibration_rms","flow"]
	// [bearing_temp (°C) vibration_rms (mm/s) flow (m³/h)]
	// failing
}
