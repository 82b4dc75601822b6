// Package onnxtestdata locates the ONNX backend test data that Debian's
// libonnx-testdata package (1.12.0) installs, for tests only.
package onnxtestdata

import (
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"testing"
)

// Package is the Debian package that ships the data.
const Package = "libonnx-testdata"

// DefaultDir is where the Debian package installs the data.
const DefaultDir = "/usr/share/libonnx-testdata/data"

// Suites are the backend test suites the project checks against.
var Suites = []string{"node", "pytorch-converted", "pytorch-operator", "simple"}

// Dir returns the data directory ($ONNX_TESTDATA overrides the default). When
// the data is absent the test is skipped with a message naming the package,
// or failed when CI=true.
func Dir(t testing.TB) string {
	t.Helper()
	dir := os.Getenv("ONNX_TESTDATA")
	if dir == "" {
		dir = DefaultDir
	}
	if st, err := os.Stat(filepath.Join(dir, "node")); err == nil && st.IsDir() {
		return dir
	}
	msg := "ONNX backend test data not found at " + dir + ": install the Debian package " + Package + " (apt-get install -y " + Package + ")"
	if os.Getenv("CI") == "true" {
		t.Fatal(msg)
	}
	t.Skip(msg)
	return ""
}

// Case is one backend test case: a model and its test-data sets.
type Case struct {
	Suite string // "node", "simple", ...
	Name  string // e.g. "test_relu"
	Dir   string // the case directory
	Model string // path of model.onnx
	// Sets are the test_data_set_* directories, sorted.
	Sets []string
}

// Cases lists every case of the suites under dir, sorted by suite and name.
func Cases(t testing.TB, dir string) []Case {
	t.Helper()
	var out []Case
	for _, s := range Suites {
		entries, err := os.ReadDir(filepath.Join(dir, s))
		if err != nil {
			t.Fatalf("reading suite %s: %v", s, err)
		}
		for _, e := range entries {
			if !e.IsDir() {
				continue
			}
			cdir := filepath.Join(dir, s, e.Name())
			c := Case{Suite: s, Name: e.Name(), Dir: cdir, Model: filepath.Join(cdir, "model.onnx")}
			sets, _ := filepath.Glob(filepath.Join(cdir, "test_data_set_*"))
			sort.Strings(sets)
			c.Sets = sets
			out = append(out, c)
		}
	}
	return out
}

// SetFiles returns the input_*.pb and output_*.pb files of one data set,
// each sorted by their numeric index.
func SetFiles(set string) (inputs, outputs []string) {
	inputs = numbered(set, "input_")
	outputs = numbered(set, "output_")
	return
}

func numbered(dir, prefix string) []string {
	var out []string
	for i := 0; ; i++ {
		p := filepath.Join(dir, prefix+strconv.Itoa(i)+".pb")
		if _, err := os.Stat(p); err != nil {
			return out
		}
		out = append(out, p)
	}
}
