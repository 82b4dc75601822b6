package fidelity_test

import (
	"bytes"
	"context"
	"testing"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/fidelity"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// demoSetup loads a demo's model, compiled, the head explained and the
// first n held-out samples the model classes as the demo's sample class.
func demoSetup(t *testing.T, name string, n int) (*explain.Model, gradattr.Model, [][]float64, [][]float64) {
	t.Helper()
	sc, err := demo.Get(name)
	if err != nil {
		t.Fatal(err)
	}
	m, err := explain.Decode(sc.Model, "demo:"+sc.ModelFile, explain.DecodeOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if err := m.Compile(explain.CompileOptions{Parallel: 1}); err != nil {
		t.Fatal(err)
	}
	head, err := m.Head("", false)
	if err != nil {
		t.Fatal(err)
	}
	spec, err := m.Input()
	if err != nil {
		t.Fatal(err)
	}
	raw, err := demo.File(sc.Test[0])
	if err != nil {
		t.Fatal(err)
	}
	test, err := samples.Read(bytes.NewReader(raw), sc.Test[0], spec, m.ReadOptions(false))
	if err != nil {
		t.Fatal(err)
	}
	ref, err := samples.Read(bytes.NewReader(sc.Reference), sc.ReferenceFile, spec, m.ReadOptions(false))
	if err != nil {
		t.Fatal(err)
	}
	class := -1
	for i, c := range m.Meta.Classes {
		if c == sc.SampleClass {
			class = i
		}
	}
	var xs [][]float64
	for i := 0; i < test.Samples && len(xs) < n; i++ {
		out, err := head.Forward(context.Background(), test.Sample(i), 1)
		if err != nil {
			t.Fatal(err)
		}
		if gradattr.Top(out) == class {
			xs = append(xs, test.Sample(i))
		}
	}
	if len(xs) < n {
		t.Fatalf("%s: %d held-out samples classed %s, want %d", name, len(xs), sc.SampleClass, n)
	}
	return m, head, xs, ref.Rows()
}

// The model-parameter randomization test (Adebayo et al. 2018, §3): a
// model-blind attribution, the input itself (the test's control), keeps a
// rank correlation of 1 with itself however the model is randomized and
// fails; integrated gradients and the gradient, on both demos, fall below
// 0.5 (the threshold of the check; Adebayo et al. read their figures by eye)
// once every layer is randomized.
func TestRandomizationDemos(t *testing.T) {
	ctx := context.Background()
	input := func(_ context.Context, _ gradattr.Model, x []float64, _ int) ([]float64, error) {
		return append([]float64(nil), x...), nil
	}
	for _, name := range []string{"pumps", "welds"} {
		m, head, xs, _ := demoSetup(t, name, 4)
		layers := m.Layers()
		cascade := m.Cascade("", false, 1, explain.CompileOptions{Parallel: 1})
		shape := head.InputShape()
		for _, tc := range []struct {
			name string
			a    fidelity.Attributor
			pass bool
		}{
			{"input (control)", input, false},
			{"integrated gradients", fidelity.Method(gradattr.Options{Method: gradattr.MethodIntegratedGradients, Points: 32}), true},
			{"gradient", fidelity.Method(gradattr.Options{Method: gradattr.MethodGradient}), true},
		} {
			sum := 0.0
			for _, x := range xs {
				out, err := head.Forward(ctx, x, 1)
				if err != nil {
					t.Fatal(err)
				}
				target := gradattr.Top(out)
				attr, err := tc.a(ctx, head, x, target)
				if err != nil {
					t.Fatal(err)
				}
				steps, err := fidelity.Randomization(ctx, tc.a, cascade, len(layers), x, shape, target, attr)
				if err != nil {
					t.Fatal(err)
				}
				sum += steps[len(steps)-1].Spearman
			}
			rho := sum / float64(len(xs))
			if passed := rho < 0.5; passed != tc.pass {
				t.Errorf("%s, %s: mean ρ after randomizing all %d layers = %.3f; passes (< 0.5): %v, want %v", name, tc.name, len(layers), rho, passed, tc.pass)
			} else {
				t.Logf("%s, %s: mean ρ after randomizing all %d layers = %.3f", name, tc.name, len(layers), rho)
			}
		}
	}
}

// On the pumps demo, with the mean of the normal pumps as the baseline,
// removing features in the order of integrated gradients brings the
// failing pumps' output down faster than random orders: the upper end of
// IG's 95% interval of the deletion area lies below the lower end of the
// random orders' (Petsiuk et al. 2018's reading of the deletion curve).
func TestPumpsDeletionBeatsRandomOrders(t *testing.T) {
	_, head, xs, ref := demoSetup(t, "pumps", 20)
	base, err := gradattr.Baseline{Kind: gradattr.BaselineMean, Reference: ref}.Build(ref[0], head.InputShape())
	if err != nil {
		t.Fatal(err)
	}
	rep, err := fidelity.Assess(context.Background(), fidelity.Config{
		Model: head, Samples: xs, Reference: ref, Baseline: base, Target: gradattr.TargetTop, Seed: 1,
		Methods: []gradattr.Method{gradattr.MethodIntegratedGradients},
		Metrics: []fidelity.Metric{fidelity.MetricDeletion, fidelity.MetricInsertion},
	})
	if err != nil {
		t.Fatal(err)
	}
	d, r := rep.Methods[0].Deletion, rep.Random.Deletion
	if d == nil || r == nil || !(d.Hi < r.Lo) {
		t.Fatalf("integrated gradients' deletion area %+v, random orders' %+v: want IG's interval below", d, r)
	}
	t.Logf("deletion area: integrated gradients %.3f [%.3f, %.3f], random orders %.3f [%.3f, %.3f]", d.Mean, d.Lo, d.Hi, r.Mean, r.Lo, r.Hi)
}
