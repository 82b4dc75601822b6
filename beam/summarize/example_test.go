package summarize_test

import (
	"bytes"
	"fmt"
	"log"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/testing/ptest"

	"github.com/apportion/apportion/beam/summarize"
	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
)

// Summarize typed rows of the invented pumps demo on prism: integrated
// gradients against the mean healthy pump, and a row that could not be
// read, which the summary counts as skipped.
func ExampleSummarize() {
	s, err := demo.Get("pumps")
	if err != nil {
		log.Fatal(err)
	}
	cfg := summarize.Config{
		Model: s.Model, ModelName: "pumps.onnx", Seed: 1, Bootstrap: 50,
		Settings: []summarize.Setting{
			{Field: explain.FieldBaseline, Text: "mean"}, {Field: explain.FieldReference, Text: "reference.csv"},
			{Field: explain.FieldSteps, Text: "32"},
		},
		Reference: &summarize.File{Name: "reference.csv", Data: s.Reference},
	}
	plan, err := summarize.NewPlan(cfg, nil, "") // the model declares 8 features a row
	if err != nil {
		log.Fatal(err)
	}
	raw, err := demo.File("pumps_test.csv")
	if err != nil {
		log.Fatal(err)
	}
	var rows []summarize.Row
	for i, line := range strings.Split(string(raw), "\n")[1:41] {
		row := summarize.Row{Key: uint64(i), Where: "line " + strconv.Itoa(i+2)}
		for _, f := range strings.Split(line, ",")[:8] {
			v, err := strconv.ParseFloat(f, 64)
			if err != nil {
				row.Error = err.Error()
			}
			row.Values = append(row.Values, v)
		}
		rows = append(rows, row)
	}
	rows = append(rows, summarize.Row{Key: 40, Where: "line 42", Error: "expected 10 fields, got 3"})

	p, scope := beam.NewPipelineWithRoot()
	summary, _ := summarize.Summarize(scope, plan, beam.CreateList(scope, rows))
	dir, err := os.MkdirTemp("", "summary")
	if err != nil {
		log.Fatal(err)
	}
	defer os.RemoveAll(dir)
	out := filepath.Join(dir, "summary.json")
	summarize.Write(scope, out, summary)
	if err := ptest.Run(p); err != nil {
		log.Fatal(err)
	}
	doc, err := os.ReadFile(out)
	if err != nil {
		log.Fatal(err)
	}
	sum, err := gradattr.DecodeSummary(bytes.NewReader(doc))
	if err != nil {
		log.Fatal(err)
	}
	fmt.Println(sum.Rows(), "rows,", sum.SkippedRows(), "skipped")
	// The three features of largest mean |attribution| are the three the
	// invented labelling rule uses (demo/data/README.md).
	var top []string
	for _, f := range sum.Overall().Ranked()[:3] {
		top = append(top, f.Feature)
	}
	sort.Strings(top)
	fmt.Println(strings.Join(top, ", "))
	// Output:
	// 40 rows, 1 skipped
	// bearing_temp, hours_since_service, vibration_rms
}
