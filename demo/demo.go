// Package demo embeds apportion's three invented demo scenarios: the models,
// one sample each to explain, reference sets for baselines and held-out test
// sets. All of it is made up; data/README.md says how each file was made and
// `go run ./examples/train -out demo/data` regenerates it.
//
// The scenarios are:
//
//   - pumps (the default): condition monitoring of centrifugal pumps, eight
//     sensor readings → normal, degraded or failing. The hidden rule uses
//     only vibration_rms, bearing_temp and hours_since_service.
//   - welds: a 1×32×32 grey patch of a weld seam → clean or defective
//     (a crack or porosity), with ground-truth defect masks.
//   - tickets: a pump technician's maintenance note of up to 16 words →
//     urgent, routine or informational, decided by one planted word; the
//     model reads token ids and carries its vocabulary in its metadata.
package demo

import (
	"embed"
	"errors"
	"fmt"
	"io/fs"
	"sort"
	"strings"
)

//go:embed data/*
var files embed.FS

// Default is the scenario used when none is named.
const Default = "pumps"

// ErrUnknown is returned by Get for a name that is not a scenario.
var ErrUnknown = errors.New("demo: unknown scenario")

// Scenario is one demo: its files, as bytes, and their names in data/.
type Scenario struct {
	// Name is the scenario's name, "pumps" or "welds".
	Name string
	// Description is one invented sentence about the scenario.
	Description string

	// Model is the ONNX model; ModelFile is its file name (pumps.onnx).
	Model     []byte
	ModelFile string

	// Sample is one input to explain, as JSON: a flat list of 8 numbers for
	// pumps, a nested [1][32][32] list for welds; for tickets a text file,
	// one note per line. SampleClass is its true class.
	Sample      []byte
	SampleFile  string
	SampleClass string

	// Reference is the reference population for mean baselines and expected
	// gradients: pumps_reference.csv (200 normal rows with a header of the
	// feature names), welds_reference.npy (32 clean patches, float32
	// [32,1,32,32]) or tickets_reference.txt (40 routine notes).
	Reference     []byte
	ReferenceFile string

	// Test lists the held-out test set's files, by file name. pumps:
	// pumps_test.csv (500 rows; the 8 features, pump_line, label). welds:
	// welds_test_patches.npy (float32 [200,1,32,32]), welds_test_masks.npy
	// (uint8 [200,32,32]) and welds_test_labels.npy (int64 [200,2]: class,
	// defect kind). tickets: tickets_test.txt (600 notes, one per line) and
	// tickets_test_truth.npy (int64 [600,2]: class, position of the planted
	// deciding word).
	Test []string
}

// scenarios describes each scenario's files.
var scenarios = map[string]Scenario{
	"pumps": {
		Name:          "pumps",
		Description:   "Invented condition monitoring of centrifugal pumps: eight sensor readings classed normal, degraded or failing.",
		ModelFile:     "pumps.onnx",
		SampleFile:    "pumps_sample.json",
		SampleClass:   "failing",
		ReferenceFile: "pumps_reference.csv",
		Test:          []string{"pumps_test.csv"},
	},
	"welds": {
		Name:          "welds",
		Description:   "Invented visual inspection of weld seams: a 32×32 grey patch classed clean or defective (crack or porosity).",
		ModelFile:     "welds.onnx",
		SampleFile:    "welds_sample.json",
		SampleClass:   "defective",
		ReferenceFile: "welds_reference.npy",
		Test:          []string{"welds_test_patches.npy", "welds_test_masks.npy", "welds_test_labels.npy"},
	},
	"tickets": {
		Name:          "tickets",
		Description:   "Invented triage of pump technicians' maintenance notes: a note of up to 16 words classed urgent, routine or informational.",
		ModelFile:     "tickets.onnx",
		SampleFile:    "tickets_sample.txt",
		SampleClass:   "urgent",
		ReferenceFile: "tickets_reference.txt",
		Test:          []string{"tickets_test.txt", "tickets_test_truth.npy"},
	},
}

// Names returns the scenario names, sorted.
func Names() []string {
	names := make([]string, 0, len(scenarios))
	for n := range scenarios {
		names = append(names, n)
	}
	sort.Strings(names)
	return names
}

// Get returns the scenario called name; the empty name means Default. The
// returned byte slices are fresh copies the caller may modify.
func Get(name string) (*Scenario, error) {
	if name == "" {
		name = Default
	}
	s, ok := scenarios[name]
	if !ok {
		return nil, fmt.Errorf("%w %q: want one of %s", ErrUnknown, name, strings.Join(Names(), ", "))
	}
	var err error
	if s.Model, err = File(s.ModelFile); err != nil {
		return nil, err
	}
	if s.Sample, err = File(s.SampleFile); err != nil {
		return nil, err
	}
	if s.Reference, err = File(s.ReferenceFile); err != nil {
		return nil, err
	}
	s.Test = append([]string(nil), s.Test...)
	return &s, nil
}

// File returns a copy of the embedded file called name (a base name such as
// "pumps_test.csv").
func File(name string) ([]byte, error) {
	b, err := fs.ReadFile(files, "data/"+name)
	if err != nil {
		return nil, fmt.Errorf("demo: file %q: %w", name, err)
	}
	return b, nil
}

// Files returns the base names of all embedded files, sorted.
func Files() []string {
	ents, err := fs.ReadDir(files, "data")
	if err != nil {
		return nil // the embedded directory always exists
	}
	var names []string
	for _, e := range ents {
		names = append(names, e.Name())
	}
	return names
}
