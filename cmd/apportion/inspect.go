package main

import (
	"encoding/json"
	"io"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/render"
)

func runInspect(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("inspect", "-model PATH [-format table|json]",
		"apportion inspect -model model.onnx -format json",
		"Lists the inputs a caller binds (initializer-backed inputs are parameters),\n"+
			"the outputs, the default-domain opset, the producer, the node count per\n"+
			"operator, the number of float parameters, the metadata and the operators\n"+
			"apportion cannot run.", stderr)
	modelPath := fs.String("model", "", "ONNX model `file` (required)")
	format := fs.String("format", "table", "output format: table or json")
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
