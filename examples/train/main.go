// Command train regenerates apportion's invented demo scenarios: it draws
// the data sets from a seed, trains the two demo networks with gorgonia,
// exports them as ONNX with onnxlite and writes every file the demo package
// embeds.
//
//	go run ./examples/train -out demo/data
//
// The scenarios are invented, and so are all their numbers:
//
//   - pumps: eight sensor readings of a centrifugal pump → normal, degraded
//     or failing, from a hidden score of vibration_rms, bearing_temp and
//     hours_since_service only (see pumpScore).
//   - welds: a 32×32 grey patch of a weld seam → clean or defective, where a
//     defect is a crack or porosity with a known pixel mask (see drawWeld).
//
// The data sets are a pure function of -seed. Training is seeded as well
// and single-threaded, so a rerun on the same machine writes the same files.
package main

import (
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"
)

func main() {
	os.Exit(run(os.Args[1:], os.Stdout, os.Stderr))
}

// Training settings of the committed models.
var (
	pumpsTraining = trainConfig{Epochs: 60, BatchSize: 50, LearnRate: 0.01}
	weldsTraining = trainConfig{Epochs: 20, BatchSize: 32, LearnRate: 0.003}
)

// defaultSeed is the seed of the committed files.
const defaultSeed = 1

// run is the whole program; main only maps its result to the exit status
// (0 done, 1 failed, 2 usage error).
func run(args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("train", flag.ContinueOnError)
	fs.SetOutput(stderr)
	out := fs.String("out", filepath.Join("internal", "demo", "data"), "directory to write the demo files to")
	seed := fs.Uint64("seed", defaultSeed, "seed of the data sets and of training")
	only := fs.String("only", "", "regenerate one scenario only: pumps or welds (default both)")
	fs.Usage = func() {
		fmt.Fprintf(stderr, "usage: go run ./examples/train [-out dir] [-seed n] [-only pumps|welds]\n\n")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		return 2
	}
	if fs.NArg() > 0 || (*only != "" && *only != "pumps" && *only != "welds") {
		fs.Usage()
		return 2
	}
	if err := os.MkdirAll(*out, 0o755); err != nil {
		fmt.Fprintln(stderr, "train:", err)
		return 1
	}
	w := &writer{dir: *out, log: stdout}
	if *only == "" || *only == "pumps" {
		if err := buildPumps(w, *seed); err != nil {
			fmt.Fprintln(stderr, "train: pumps:", err)
			return 1
		}
	}
	if *only == "" || *only == "welds" {
		if err := buildWelds(w, *seed); err != nil {
			fmt.Fprintln(stderr, "train: welds:", err)
			return 1
		}
	}
	return 0
}

// writer writes files into dir and reports each one.
type writer struct {
	dir string
	log io.Writer
}

// output is one file to write and how to make its bytes.
type output struct {
	name string
	make func() ([]byte, error)
}

// writeAll makes and writes each output in turn.
func (w *writer) writeAll(outs []output) error {
	for _, o := range outs {
		data, err := o.make()
		if err != nil {
			return fmt.Errorf("%s: %w", o.name, err)
		}
		if err := w.write(o.name, data); err != nil {
			return err
		}
	}
	return nil
}

// write writes data to the file name in w.dir and reports its size.
func (w *writer) write(name string, data []byte) error {
	path := filepath.Join(w.dir, name)
	if err := os.WriteFile(path, data, 0o644); err != nil {
		return err
	}
	fmt.Fprintf(w.log, "wrote %-44s %8d bytes\n", path, len(data))
	return nil
}

// pumpsMatrix flattens rows into n×8 features and their labels.
func pumpsMatrix(rows []pumpRow) ([]float64, []int) {
	x := make([]float64, 0, len(rows)*8)
	labels := make([]int, 0, len(rows))
	for _, r := range rows {
		x = append(x, r.X[:]...)
		labels = append(labels, r.Label)
	}
	return x, labels
}

// jsonLine marshals v followed by a newline.
func jsonLine(v any) ([]byte, error) {
	b, err := json.Marshal(v)
	return append(b, '\n'), err
}

// buildPumps draws the pumps data, trains and exports the model, and
// writes the pumps files.
func buildPumps(w *writer, seed uint64) error {
	rows := generatePumps(seed)
	train, test := rows[:pumpTrainRows], rows[pumpTrainRows:]
	x, labels := pumpsMatrix(train)
	start := time.Now()
	cfg := pumpsTraining
	cfg.Seed = seed
	m, err := trainMLP(x, labels, len(train), cfg)
	if err != nil {
		return fmt.Errorf("training: %w", err)
	}
	elapsed := time.Since(start)
	correct := 0
	for _, r := range test {
		if m.predict(r.X[:]) == r.Label {
			correct++
		}
	}
	_, testLabels := pumpsMatrix(test)
	counts := classCounts(testLabels, 3)
	fmt.Fprintf(w.log, "pumps: trained in %v; held-out accuracy %.3f (%d/%d); majority class %.3f\n",
		elapsed.Round(time.Millisecond), float64(correct)/float64(len(test)), correct, len(test),
		float64(max(counts[0], counts[1], counts[2]))/float64(len(test)))

	model, err := pumpsModel(m)
	if err != nil {
		return err
	}
	sample, err := pumpSample(rows, m.probabilities)
	if err != nil {
		return err
	}
	return w.writeAll([]output{
		{"pumps.onnx", func() ([]byte, error) { return encodeModel(model) }},
		{"pumps_sample.json", func() ([]byte, error) { return jsonLine(sample.X[:]) }},
		{"pumps_reference.csv", func() ([]byte, error) { return pumpCSV(pumpReference(rows), false) }},
		{"pumps_test.csv", func() ([]byte, error) { return pumpCSV(test, true) }},
	})
}

// weldSample returns the first defective held-out patch.
func weldSample(s weldSet) (weldPatch, error) {
	for _, p := range s.Test {
		if p.Label == 1 {
			return p, nil
		}
	}
	return weldPatch{}, fmt.Errorf("no defective held-out patch")
}

// buildWelds draws the welds data, trains and exports the model, and
// writes the welds files.
func buildWelds(w *writer, seed uint64) error {
	s := generateWelds(seed)
	start := time.Now()
	cfg := weldsTraining
	cfg.Seed = seed
	m, err := trainCNN(s.Train, cfg)
	if err != nil {
		return fmt.Errorf("training: %w", err)
	}
	elapsed := time.Since(start)
	correct := 0
	for i := range s.Test {
		if m.predict(&s.Test[i]) == s.Test[i].Label {
			correct++
		}
	}
	fmt.Fprintf(w.log, "welds: trained in %v; held-out accuracy %.3f (%d/%d)\n",
		elapsed.Round(time.Millisecond), float64(correct)/float64(len(s.Test)), correct, len(s.Test))

	model, err := weldsModel(m)
	if err != nil {
		return err
	}
	sample, err := weldSample(s)
	if err != nil {
		return err
	}
	return w.writeAll([]output{
		{"welds.onnx", func() ([]byte, error) { return encodeModel(model) }},
		{"welds_sample.json", func() ([]byte, error) { return weldSampleJSON(sample) }},
		{"welds_reference.npy", func() ([]byte, error) { return weldPatchesNPY(s.Reference) }},
		{"welds_test_patches.npy", func() ([]byte, error) { return weldPatchesNPY(s.Test) }},
		{"welds_test_masks.npy", func() ([]byte, error) { return weldMasksNPY(s.Test) }},
		{"welds_test_labels.npy", func() ([]byte, error) { return weldLabelsNPY(s.Test) }},
	})
}
