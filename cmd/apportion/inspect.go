package main

import (
	"encoding/json"
	"io"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/render"
)

func runInspect(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("inspect", "-model PATH [-values] [-format table|json]",
		"apportion inspect -model model.onnx -format json\n\tapportion inspect -model model.onnx -values",
		"Lists the inputs a caller binds (initializer-backed inputs are parameters),\n"+
			"the outputs, the default-domain opset, the producer, the node count per\n"+
			"operator, the number of float parameters, the metadata and the operators\n"+
			"apportion cannot run. -values also lists the values the model computes\n"+
			"from its input, with the operator that produces each and its shape per\n"+
			"sample: the names explain -layer accepts.", stderr)
	modelPath := fs.String("model", "", "ONNX model `file` (required)")
	format := fs.String("format", "table", "output format: table or json")
	values := fs.Bool("values", false, "also list the values the model computes (the names -layer accepts)")
	if code, done := parseFlags(fs, args, stdout); done {
		return code
	}
	if *modelPath == "" {
		return usageError(stderr, "inspect", "-model is required")
	}
	if *format != "table" && *format != "json" {
		return usageError(stderr, "inspect", "-format must be table or json, got %q", *format)
	}
	m, err := explain.ReadModel(*modelPath)
	if err != nil {
		return failure(stderr, "inspect", err)
	}
	rep := m.Describe()
	if *values {
		if err := m.Compile(explain.CompileOptions{}); err != nil {
			return failure(stderr, "inspect", err)
		}
		if err := m.DescribeValues(rep); err != nil {
			return failure(stderr, "inspect", err)
		}
	}
	if *format == "json" {
		enc := json.NewEncoder(stdout)
		enc.SetIndent("", "  ")
		if err := enc.Encode(rep); err != nil {
			return failure(stderr, "inspect", err)
		}
		return exitOK
	}
	render.DescriptionTable(stdout, *modelPath, rep)
	return exitOK
}
