// Package ortdata reads the ONNX Runtime 1.30 reference cases committed in
// testdata/ort (see its README), for tests only.
package ortdata

import (
	"encoding/json"
	"os"
	"path/filepath"
	"runtime"
	"sort"
	"testing"
)

// Input is one graph input of a case.
type Input struct {
	Name  string `json:"name"`
	DType string `json:"dtype"`
	Shape []int  `json:"shape"`
	// Role is "shape" for an integer input that reaches only shape
	// positions, "indices" for one that feeds Gather indices, empty for
	// the others.
	Role string `json:"role"`
}

// Case is one entry of testdata/ort/manifest.json.
type Case struct {
	Name     string   `json:"name"`
	Dir      string   `json:"dir"` // absolute once read by Cases
	Ops      []string `json:"ops"`
	Opset    int64    `json:"opset"`
	Revision string   `json:"revision"`
	Kind     string   `json:"kind"`
	Checks   string   `json:"checks"`
	Inputs   []Input  `json:"inputs"`
	Batch    string   `json:"batch"`
	ORTModel string   `json:"ort_model"`
}

// Model is the path of the case's model.onnx.
func (c Case) Model() string { return filepath.Join(c.Dir, "model.onnx") }

// Sets are the case's test_data_set_* directories, sorted.
func (c Case) Sets() []string {
	sets, _ := filepath.Glob(filepath.Join(c.Dir, "test_data_set_*"))
	sort.Strings(sets)
	return sets
}

// Dir is the directory of the cases: testdata/ort at the repository root.
func Dir() string {
	_, file, _, _ := runtime.Caller(0)
	return filepath.Join(filepath.Dir(file), "..", "..", "testdata", "ort")
}

// Cases reads the manifest; the files are committed, so a failure to read
// them fails the test.
func Cases(t testing.TB) []Case {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(Dir(), "manifest.json"))
	if err != nil {
		t.Fatalf("reading the ONNX Runtime fixtures: %v", err)
	}
	var m struct {
		Cases []Case `json:"cases"`
	}
	if err := json.Unmarshal(b, &m); err != nil {
		t.Fatalf("testdata/ort/manifest.json: %v", err)
	}
	for i := range m.Cases {
		m.Cases[i].Dir = filepath.Join(Dir(), m.Cases[i].Dir)
	}
	return m.Cases
}
