package main

import (
	"context"
	"encoding/json"
	"fmt"
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
			"excluded), of any numeric type: floating point (float16 and bfloat16\n"+
			"widened), integer (token ids, target shapes) or bool. A .pb file is an\n"+
			"ONNX TensorProto used with its stored shape;\n"+
			".npy, .json and .csv files hold samples of the input's per-sample shape\n"+
			"(its shape without the leading batch dimension): a CSV row per sample with\n"+
			"an optional header row, JSON nested arrays for one sample or an array of them.", stderr)
	modelPath := fs.String("model", "", "ONNX model `file` (required)")
	var inputs multiFlag
	fs.Var(&inputs, "input", "input `file` (.pb, .npy, .json or .csv); repeat once per graph input")
	format := fs.String("format", "json", "output format: json or table")
	var precision string
	registerPrecisionFlag(fs, &precision)
	if code, done := parseFlags(fs, args, stdout); done {
		return code
	}
	if *modelPath == "" {
		return usageError(stderr, "predict", "-model is required")
	}
	if *format != "table" && *format != "json" {
		return usageError(stderr, "predict", "-format must be json or table, got %q", *format)
	}
	dtype, err := explain.ParsePrecision(precision)
	if err != nil {
		return usageError(stderr, "predict", "-%v", err)
	}
	m, err := explain.ReadModel(*modelPath)
	if err != nil {
		return failure(stderr, "predict", err)
	}
	feeds := m.Inputs()
	if len(inputs) == 0 && len(feeds) > 0 {
		return usageError(stderr, "predict", "-input is required")
	}
	if len(inputs) != len(feeds) {
		names := make([]string, len(feeds))
		for i, f := range feeds {
			names[i] = f.Name
		}
		return usageError(stderr, "predict", "the model has %s (%s), got %s", render.Count(len(feeds), "input", "inputs"), strings.Join(names, ", "), render.Count(len(inputs), "-input file", "-input files"))
	}
	if len(feeds) == 1 {
		res, count, err := predictStream(m, inputs[0], samples.SpecOf(feeds[0]), m.ReadOptions(false), dtype, stderr)
		if err != nil {
			return failure(stderr, "predict", err)
		}
		return writePrediction(stdout, stderr, *format, m, res, count)
	}
	tensors := make([]*onnxlite.Tensor, len(feeds))
	open := map[string][]int{}
	count := 0
	var opt samples.Options
	opt.AllowEmpty = true // a .pb tensor is fed as it is: empty axes, or no rows
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
	if err := m.Compile(explain.CompileOptions{InputShapes: open, Parallel: runtime.GOMAXPROCS(0), DType: dtype}); err != nil {
		return failure(stderr, "predict", err)
	}
	res, err := m.Predict(context.Background(), tensors)
	if err != nil {
		return failure(stderr, "predict", err)
	}
	return writePrediction(stdout, stderr, *format, m, res, count)
}

// writePrediction writes the outputs of count samples in format.
func writePrediction(stdout, stderr io.Writer, format string, m *explain.Model, res *explain.Prediction, count int) int {
	for _, e := range res.Errors {
		fmt.Fprintf(stderr, "apportion predict: sample %d left out: %s\n", e.Index, e.Error)
	}
	status := exitOK
	if len(res.Errors) > 0 {
		status = exitFail
	}
	if format == "json" {
		if err := json.NewEncoder(stdout).Encode(res); err != nil {
			return failure(stderr, "predict", err)
		}
		return status
	}
	render.PredictionTable(stdout, res.Outputs, count, res.Rows, m.Meta.Classes)
	return status
}
