package explain_test

import (
	"bytes"
	"context"
	"fmt"
	"log"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/samples"
)

// The README's "Using the library" section shows the body of this example
// (TestReadmeShowsExample keeps them equal): a model and samples read, the
// default settings, the explanations and their completeness.
func Example() {
	s, err := demo.Get("pumps") // an invented model and sample; explain.ReadModel("model.onnx") reads yours
	if err != nil {
		log.Fatal(err)
	}
	m, err := explain.Decode(s.Model, "pumps.onnx", explain.DecodeOptions{})
	if err != nil {
		log.Fatal(err)
	}
	if err := m.Compile(explain.CompileOptions{}); err != nil { // the model is then safe for concurrent use
		log.Fatal(err)
	}
	spec, err := m.Input()
	if err != nil {
		log.Fatal(err)
	}
	rows, err := samples.Read(bytes.NewReader(s.Sample), s.SampleFile, spec, m.ReadOptions(true)) // CSV, JSON, .npy or .pb
	if err != nil {
		log.Fatal(err)
	}
	settings := explain.Defaults() // integrated gradients of the top output against the zero baseline
	head, err := m.Head(settings.Output, settings.Logits)
	if err != nil {
		log.Fatal(err)
	}
	ex, err := explain.New(m, head, settings)
	if err != nil {
		log.Fatal(err)
	}
	rep, err := ex.Explain(context.Background(), rows, nil)
	if err != nil {
		log.Fatal(err)
	}
	r := rep.Explanations[0].Result // rep.WriteJSON writes the explain document, render.Table the table
	fmt.Printf("%s of %q: Σ attributions %.2f, f(x) − f(x′) %.2f, complete: %v\n",
		r.Settings.Method, m.Meta.Class(r.Target), r.Completeness.Sum, r.Completeness.Expected, r.Completeness.OK)
	// Output:
	// integrated-gradients of "failing": Σ attributions 0.97, f(x) − f(x′) 0.97, complete: true
}

// Explaining the embedded pumps demo (an invented classifier of pump
// condition from eight sensor readings) the way the command line does with
// -baseline mean: integrated gradients of the predicted class against the
// mean of the demo's normal pumps, the features named by the model.
func ExampleSettings_Set() {
	s, err := demo.Get("pumps")
	if err != nil {
		fmt.Println(err)
		return
	}
	m, err := explain.Decode(s.Model, "demo:"+s.ModelFile, explain.DecodeOptions{})
	if err != nil {
		fmt.Println(err)
		return
	}
	if err := m.Compile(explain.CompileOptions{}); err != nil {
		fmt.Println(err)
		return
	}
	spec, err := m.Input()
	if err != nil {
		fmt.Println(err)
		return
	}
	sample, err := samples.Read(bytes.NewReader(s.Sample), s.SampleFile, spec, m.ReadOptions(true))
	if err != nil {
		fmt.Println(err)
		return
	}
	normal, err := samples.Read(bytes.NewReader(s.Reference), s.ReferenceFile, spec, m.ReadOptions(false))
	if err != nil {
		fmt.Println(err)
		return
	}

	settings := explain.Defaults() // integrated gradients of the largest output
	if err := settings.Set(explain.FieldBaseline, "mean"); err != nil {
		fmt.Println(err)
		return
	}
	settings.Reference = explain.NewDataset(s.ReferenceFile, s.Reference, normal)
	head, err := m.Head(settings.Output, settings.Logits)
	if err != nil {
		fmt.Println(err)
		return
	}
	ex, err := explain.New(m, head, settings)
	if err != nil {
		fmt.Println(err)
		return
	}
	rep, err := ex.Explain(context.Background(), sample, nil)
	if err != nil {
		fmt.Println(err)
		return
	}
	e := rep.Explanations[0]
	labels := rep.Labels()
	fmt.Printf("%s: %s of %s\n", rep.Settings.Method, m.Meta.Class(e.Result.Target), rep.Output)
	for i, a := range e.Result.Attributions {
		if a > 0.1 {
			fmt.Printf("%-24s %+.2f\n", labels[i], a)
		}
	}
	fmt.Println("complete:", e.Result.Completeness.OK)
	// Output:
	// integrated-gradients: failing of condition
	// bearing_temp (°C)        +0.29
	// vibration_rms (mm/s)     +0.54
	// hours_since_service (h)  +0.16
	// complete: true
}
