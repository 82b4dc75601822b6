package explain_test

import (
	"bytes"
	"context"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// pumps is the embedded pumps demo, compiled, with its sample.
func pumps(f *testing.F) (*explain.Model, gradattr.Model, []float64) {
	s, err := demo.Get("pumps")
	if err != nil {
		f.Fatal(err)
	}
	m, err := explain.Decode(s.Model, "demo:"+s.ModelFile, explain.DecodeOptions{})
	if err != nil {
		f.Fatal(err)
	}
	if err := m.Compile(explain.CompileOptions{}); err != nil {
		f.Fatal(err)
	}
	head, err := m.Head("", false)
	if err != nil {
		f.Fatal(err)
	}
	spec, _ := m.Input()
	b, err := samples.Read(bytes.NewReader(s.Sample), s.SampleFile, spec, m.ReadOptions(false))
	if err != nil {
		f.Fatal(err)
	}
	return m, head, b.Sample(0)
}

// FuzzReadGroups reads arbitrary bytes as a groups file of the pumps demo
// (eight features, by index or by the model's names) and sets the groups
// to explain it. Nothing may panic; groups that are accepted sum any
// attributions.
func FuzzReadGroups(f *testing.F) {
	m, head, _ := pumps(f)
	names := m.ReadOptions(false).Features
	if len(names) != 8 {
		f.Fatalf("expected the pumps demo to name its 8 features, got %q", names)
	}
	f.Add([]byte(`{"first": ["` + names[0] + `", 7], "twice": ["` + names[1] + `", 1]}`))
	f.Add([]byte(`[{"name": "g", "indices": ["` + names[2] + `", "no such feature"]}]`))
	for _, seed := range []string{
		`{"temperatures": [0, 7], "pressures": [2, 3], "rest": [1, 4, 5, 6]}`,
		`[{"name": "a", "indices": [0, 1]}, {"name": "b", "indices": [2]}]`,
		`{"a": [0, 0, 1]}`, `{"a": [8]}`, `{"a": [-1]}`, `[{"indices": [1]}]`, `{}`, `[]`, `null`,
		`{"a": [1e3]}`, `{"a": "0"}`, `[{"name": "x", "indices": [0], "extra": true}]`,
	} {
		f.Add([]byte(seed))
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		groups, err := explain.ReadGroups(bytes.NewReader(data), 8, names)
		if err != nil {
			return
		}
		s := explain.Defaults()
		s.Groups = groups
		if _, err := explain.New(m, head, s); err != nil {
			return
		}
		r := &gradattr.Result{Attributions: []float64{1, 2, 4, 8, 16, 32, 64, 128}}
		g, err := r.Grouped(groups)
		if err != nil {
			t.Fatalf("groups accepted for 8 features do not sum 8 attributions: %v", err)
		}
		if len(g.Attributions) != len(groups) {
			t.Fatalf("%d groups, %d sums", len(groups), len(g.Attributions))
		}
	})
}

// FuzzReference reads arbitrary bytes as a reference set of the pumps demo
// in each format, and explains the demo's sample against it: integrated
// gradients from the set's mean, and expected gradients drawing from it.
// Nothing may panic; a set that is read explains, or the network fails on
// it. (A value beyond the float32 range once reached the model and made it
// return NaN; the reader refuses it now.)
func FuzzReference(f *testing.F) {
	s, err := demo.Get("pumps")
	if err != nil {
		f.Fatal(err)
	}
	// The demo's reference set cut to its first five rows (whole, its
	// 200 rows make every execution slow), and its sample.
	lines := bytes.SplitAfterN(s.Reference, []byte("\n"), 7)
	f.Add(bytes.Join(lines[:6], nil))
	f.Add(s.Sample)
	for _, ext := range []string{".csv", ".json", ".npy", ".pb"} {
		seeds, _ := filepath.Glob(filepath.Join("..", "samples", "testdata", "fuzz-seeds", "*"+ext))
		for _, p := range seeds {
			if b, err := os.ReadFile(p); err == nil {
				f.Add(b)
			}
		}
	}
	m, head, x := pumps(f)
	spec, _ := m.Input()
	f.Fuzz(func(t *testing.T, data []byte) {
		for _, name := range []string{"ref.csv", "ref.json", "ref.npy", "ref.pb"} {
			b, err := samples.Read(bytes.NewReader(data), name, spec, m.ReadOptions(false))
			if err != nil {
				if !strings.HasPrefix(err.Error(), "input "+name) {
					t.Fatalf("error does not name the file: %v", err)
				}
				continue
			}
			ref := explain.NewDataset(name, data, b)
			for _, method := range []gradattr.Method{gradattr.MethodIntegratedGradients, gradattr.MethodExpectedGradients} {
				st := explain.Defaults()
				st.Method, st.Reference, st.Samples = method, ref, 2
				if method == gradattr.MethodIntegratedGradients {
					st.Baseline, st.Steps, st.Samples = explain.Baseline{Kind: gradattr.BaselineMean}, 2, 0
				}
				ex, err := explain.New(m, head, st)
				if err != nil {
					if b.SampleSize() == 8 {
						t.Fatalf("a set of samples of 8 values is refused: %v", err)
					}
					continue
				}
				// A set within the float32 range can still make the
				// network overflow (weights × 3e38): a model failure.
				if _, err := ex.Attribute(context.Background(), x); err != nil && !errors.Is(err, gradattr.ErrModel) {
					t.Fatalf("%s against a reference set read from %s: %v", method, name, err)
				}
			}
		}
	})
}
