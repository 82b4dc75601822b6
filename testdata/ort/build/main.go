// Command build writes the ONNX Runtime reference cases in testdata/ort:
// for every case a model (written by onnxlite.Encode) and its seeded inputs
// (onnxlite.EncodeTensor), laid out like the ONNX backend test data, and
// manifest.json describing each case. testdata/ort/run.js then runs every
// model through ONNX Runtime and writes the expected outputs next to the
// inputs.
//
// Run it from the repository root:
//
//	go run ./testdata/ort/build
//	NODE_PATH=/path/to/node_modules node testdata/ort/run.js
//
// It removes testdata/ort/node and testdata/ort/model before writing, so a
// run leaves exactly the cases defined here (and no outputs until run.js has
// run). Everything is seeded: a rerun writes the same bytes.
package main

import (
	"bytes"
	"encoding/json"
	"flag"
	"fmt"
	"os"
	"path/filepath"
	"sort"

	"github.com/apportion/apportion/onnxlite"
)

func main() {
	out := flag.String("out", "testdata/ort", "directory to write the cases and manifest.json into")
	flag.Parse()
	if err := run(*out); err != nil {
		fmt.Fprintln(os.Stderr, "build:", err)
		os.Exit(1)
	}
}

func run(out string) error {
	cases := append(nodeCases(), modelCases()...)
	seen := map[string]bool{}
	for _, c := range cases {
		if seen[c.name] {
			return fmt.Errorf("two cases are called %s", c.name)
		}
		seen[c.name] = true
	}
	for _, group := range []string{"node", "model"} {
		if err := os.RemoveAll(filepath.Join(out, group)); err != nil {
			return err
		}
	}
	man := manifest{
		Generator: "go run ./testdata/ort/build",
		Runner:    "node testdata/ort/run.js",
		Tolerance: "|got - want| <= 1e-5 + 1e-4*|want| (float32 engine)",
	}
	counts := map[string]int{}
	for _, c := range cases {
		e, err := c.write(out)
		if err != nil {
			return fmt.Errorf("case %s: %w", c.name, err)
		}
		man.Cases = append(man.Cases, e)
		counts[c.kind]++
	}
	var b bytes.Buffer
	enc := json.NewEncoder(&b)
	enc.SetEscapeHTML(false)
	enc.SetIndent("", " ")
	if err := enc.Encode(man); err != nil {
		return err
	}
	if err := os.WriteFile(filepath.Join(out, "manifest.json"), b.Bytes(), 0o644); err != nil {
		return err
	}
	kinds := make([]string, 0, len(counts))
	for k := range counts {
		kinds = append(kinds, k)
	}
	sort.Strings(kinds)
	fmt.Printf("wrote %d cases to %s:", len(cases), out)
	for _, k := range kinds {
		fmt.Printf(" %s %d,", k, counts[k])
	}
	fmt.Println()
	return nil
}

// manifest is the JSON document testdata/ort/manifest.json.
type manifest struct {
	Generator string  `json:"generator"`
	Runner    string  `json:"runner"`
	Tolerance string  `json:"tolerance"`
	Cases     []entry `json:"cases"`
}

// entry describes one case in the manifest.
type entry struct {
	Name string `json:"name"`
	// Dir holds model.onnx and test_data_set_0/, relative to testdata/ort.
	Dir string `json:"dir"`
	// Ops are the operators the case is about (whole models list every
	// operator they use).
	Ops       []string `json:"ops"`
	Opset     int64    `json:"opset"`
	IRVersion int64    `json:"ir_version"`
	// Revision names the operator revision the opset selects, e.g.
	// "ReduceMean-18".
	Revision string `json:"revision"`
	// Kind is one of: semantic (a revision that changed what the operator
	// computes or accepts), type-only (a revision that only widened the
	// types), new-operator, unrevised (an operator with no revision in
	// 18-26, declared at a newer opset), shape-input (an int64 graph input
	// that reaches only shape positions), indices (an int64 graph input that
	// feeds Gather indices), dtype (half-precision inputs), model.
	Kind   string `json:"kind"`
	Checks string `json:"checks"`
	// Inputs and Outputs are in graph order: input_N.pb and output_N.pb.
	Inputs  []value `json:"inputs"`
	Outputs []value `json:"outputs"`
	// Batch names the symbolic leading dimension of every input and output
	// of a whole model ("N"); its test data holds 3 rows.
	Batch string `json:"batch,omitempty"`
	// ORTModel names the model ONNX Runtime ran instead of model.onnx when
	// it cannot take model.onnx itself (see README.md), with the same
	// inputs' bytes.
	ORTModel string `json:"ort_model,omitempty"`
}

// value is one graph input or output.
type value struct {
	Name  string  `json:"name"`
	DType string  `json:"dtype"`
	Shape []int64 `json:"shape,omitempty"`
	// Role says what an integer input feeds: "shape" (only shape positions:
	// Reshape shape, Slice starts/ends/axes/steps, axes, pads, repeats,
	// sizes) or "indices" (Gather indices at run time).
	Role string `json:"role,omitempty"`
}

var dtypeNames = map[onnxlite.DataType]string{
	onnxlite.Float: "float32", onnxlite.Double: "float64", onnxlite.Float16: "float16",
	onnxlite.BFloat16: "bfloat16", onnxlite.Int64: "int64", onnxlite.Int32: "int32",
	onnxlite.Bool: "bool", onnxlite.Uint16: "uint16",
}

// irVersion is the IR version each model declares: the lowest the ONNX
// specification's type constraints name for the opset (IRv10 for opsets
// 21-22, IRv11 for 23, IRv12 for 24, IRv13 for 25 and later), 9 for opsets
// 19-20 and 8 below (the IR versions of the ONNX releases that introduced
// those opsets, from memory).
func irVersion(opset int64) int64 {
	switch {
	case opset >= 25:
		return 13
	case opset == 24:
		return 12
	case opset == 23:
		return 11
	case opset >= 21:
		return 10
	case opset >= 19:
		return 9
	}
	return 8
}

func (c *kase) write(root string) (entry, error) {
	dir := filepath.Join(c.group, c.name)
	if err := os.MkdirAll(filepath.Join(root, dir, "test_data_set_0"), 0o755); err != nil {
		return entry{}, err
	}
	m := c.model(c.opset, c.g)
	if err := writeModel(filepath.Join(root, dir, "model.onnx"), m); err != nil {
		return entry{}, err
	}
	e := entry{
		Name: c.name, Dir: filepath.ToSlash(dir), Ops: c.ops, Opset: c.opset, IRVersion: m.IRVersion,
		Revision: c.revision, Kind: c.kind, Checks: c.checks,
	}
	if c.batch > 0 {
		e.Batch = "N"
	}
	if c.twin != nil {
		e.ORTModel = "ort_model.onnx"
		if err := writeModel(filepath.Join(root, dir, e.ORTModel), c.model(c.twinOpset, c.twin)); err != nil {
			return entry{}, err
		}
	}
	for i, t := range c.data {
		var b bytes.Buffer
		if err := onnxlite.EncodeTensor(&b, t); err != nil {
			return entry{}, err
		}
		name := filepath.Join(root, dir, "test_data_set_0", fmt.Sprintf("input_%d.pb", i))
		if err := os.WriteFile(name, b.Bytes(), 0o644); err != nil {
			return entry{}, err
		}
		e.Inputs = append(e.Inputs, value{Name: t.Name, DType: dtypeNames[t.DType], Shape: t.Dims, Role: c.roles[t.Name]})
	}
	for _, o := range c.g.Outputs {
		e.Outputs = append(e.Outputs, value{Name: o.Name, DType: dtypeNames[o.Type.Elem]})
	}
	return e, nil
}

func (c *kase) model(opset int64, g *onnxlite.Graph) *onnxlite.Model {
	return &onnxlite.Model{
		IRVersion:    irVersion(opset),
		Opsets:       []onnxlite.OpsetImport{{Version: opset}},
		ProducerName: "apportion-ort-fixtures",
		DocString:    c.checks,
		Graph:        g,
	}
}

func writeModel(path string, m *onnxlite.Model) error {
	var b bytes.Buffer
	if err := onnxlite.Encode(&b, m); err != nil {
		return err
	}
	return os.WriteFile(path, b.Bytes(), 0o644)
}
