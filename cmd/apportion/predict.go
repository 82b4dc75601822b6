package main

import (
	"context"
	"encoding/json"
	"io"
	"runtime"
	"strings"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/render"
	"github.com/apportion/apportion/samples"
)

// multiFlag collects a repeated string flag.
type multiFlag []string

func (m *multiFlag) String() string { return strings.Join(*m, ",") }

func (m *multiFlag) Set(v string) error {
	*m = append(*m, v)
	return nil
}

func runPredict(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("predict", "-model PATH -input FILE [-input FILE ...] [-format json|table]",
		"apportion predict -model model.onnx -input samples.csv -format table",
		"Inputs bind to the model's graph inputs in order (initializer-backed inputs\n"+
			"excluded). A .pb file is an ONNX TensorProto used with its stored shape;\n"+
			".npy, .json and .csv files hold samples of the input's per-sample shape\n"+
			"(its shape without the leading batch dimension): a CSV row per sample with\n"+
			"an optional header row, JSON nested arrays for one sample or an array of them.", stderr)
	modelPath := fs.String("model", "", "ONNX model `file` (required)")
	var inputs multiFlag
	fs.Var(&inputs, "input", "input `file` (.pb, .npy, .json or .csv); repeat once per graph input")
	format := fs.String("format", "json", "output format: json or table")
	if code, done := parseFlags(fs, args, stdout); done {
		return code
	}
	if *modelPath == "" {
		return usageError(stderr, "predict", "-model is required")
	}
	if len(inputs) == 0 {
		return usageError(stderr, "predict", "-input is required")
	}
	if *format != "table" && *format != "json" {
		return usageError(stderr, "predict", "-format must be json or table, got %q", *format)
	}
	m, err := explain.ReadModel(*modelPath)
	if err != nil {
		return failure(stderr, "predict", err)
	}
	feeds := m.Inputs()
	if len(inputs) != len(feeds) {
		names := make([]string, len(feeds))
		for i, f := range feeds {
			names[i] = f.Name
		}
		return usageError(stderr, "predict", "the model has %s (%s), got %s", render.Count(len(feeds), "input", "inputs"), strings.Join(names, ", "), render.Count(len(inputs), "-input file", "-input files"))
	}
	tensors := make([]*onnxlite.Tensor, len(feeds))
	open := map[string][]int{}
	count := 0
	var opt samples.Options
	if len(feeds) == 1 {
		opt = m.ReadOptions(false)
	}
	for i, vi := range feeds {
		spec := samples.SpecOf(vi)
		b, err := samples.ReadFile(inputs[i], spec, opt)
		if err != nil {
			return failure(stderr, "predict", err)
		}
		if n := ignoredNote(b.Name, b.Ignored); n != "" {
			notes(stderr, "predict", []string{n})
		}
		t, err := b.ToTensor(spec)
		if err != nil {
			return failure(stderr, "predict", err)
		}
		tensors[i] = t
		for name, shape := range explain.OpenShapes(spec, b) {
			open[name] = shape
		}
		if i == 0 {
			count = b.Samples
		}
	}
	if err := m.Compile(explain.CompileOptions{InputShapes: open, Parallel: runtime.GOMAXPROCS(0)}); err != nil {
		return failure(stderr, "predict", err)
	}
	res, err := m.Predict(context.Background(), tensors)
	if err != nil {
		return failure(stderr, "predict", err)
	}
	if *format == "json" {
		if err := json.NewEncoder(stdout).Encode(res); err != nil {
			return failure(stderr, "predict", err)
		}
		return exitOK
	}
	render.PredictionTable(stdout, res.Outputs, count, m.Meta.Classes)
	return exitOK
}
