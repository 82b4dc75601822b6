package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"runtime"
	"strconv"
	"strings"
	"text/tabwriter"

	"github.com/apportion/apportion/modelmeta"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// multiFlag collects a repeated string flag.
type multiFlag []string

func (m *multiFlag) String() string { return strings.Join(*m, ",") }

func (m *multiFlag) Set(v string) error {
	*m = append(*m, v)
	return nil
}

// numbers is a JSON array of floats written with the shortest decimal that
// reads back to the same value at the given precision (32 or 64 bits);
// NaN and ±Inf, which JSON cannot hold, are written as null, and so is a
// nil slice.
type numbers struct {
	vals []float64
	bits int
}

func (n numbers) MarshalJSON() ([]byte, error) {
	if n.vals == nil {
		return []byte("null"), nil
	}
	b := make([]byte, 0, 2+len(n.vals)*12)
	b = append(b, '[')
	for i, v := range n.vals {
		if i > 0 {
			b = append(b, ',')
		}
		if math.IsNaN(v) || math.IsInf(v, 0) {
			b = append(b, "null"...)
			continue
		}
		b = strconv.AppendFloat(b, v, 'g', -1, n.bits)
	}
	return append(b, ']'), nil
}

// predictOutput is one output tensor in predict's JSON.
type predictOutput struct {
	Name  string  `json:"name"`
	Shape []int   `json:"shape"`
	Data  numbers `json:"data"`
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
	m, err := decodeModel(*modelPath)
	if err != nil {
		return failure(stderr, "predict", err)
	}
	feeds := feedInputs(m.Graph)
	if len(inputs) != len(feeds) {
		names := make([]string, len(feeds))
		for i, f := range feeds {
			names[i] = f.Name
		}
		return usageError(stderr, "predict", "the model has %d inputs (%s), got %d -input files", len(feeds), strings.Join(names, ", "), len(inputs))
	}
	tensors := make([]*onnxlite.Tensor, len(feeds))
	open := map[string][]int{}
	count := 0
	meta := modelmeta.Read(m)
	var opt samples.Options
	if len(feeds) == 1 {
		opt.Features = meta.Features
	}
	for i, vi := range feeds {
		spec := samples.SpecOf(vi)
		b, err := samples.ReadFile(inputs[i], spec, opt)
		if err != nil {
			return failure(stderr, "predict", err)
		}
		t, err := b.ToTensor(spec)
		if err != nil {
			return failure(stderr, "predict", err)
		}
		tensors[i] = t
		for name, shape := range openShapes(spec, b) {
			open[name] = shape
		}
		if i == 0 {
			count = b.Samples
		}
	}
	net, err := compileModel(m, open, runtime.GOMAXPROCS(0))
	if err != nil {
		return failure(stderr, "predict", err)
	}
	outs, err := net.forward(context.Background(), tensors)
	if err != nil {
		return failure(stderr, "predict", err)
	}
	res, err := predictOutputs(m, outs)
	if err != nil {
		return failure(stderr, "predict", err)
	}
	if *format == "json" {
		if err := writePredictJSON(stdout, res); err != nil {
			return failure(stderr, "predict", err)
		}
		return exitOK
	}
	writePredictTable(stdout, res, count, meta.Classes)
	return exitOK
}

// predictOutputs names the output tensors of m's network as its graph
// outputs, with their values at the precision they were computed in.
func predictOutputs(m *onnxlite.Model, outs []*onnxlite.Tensor) ([]predictOutput, error) {
	res := make([]predictOutput, len(outs))
	for i, t := range outs {
		vals, err := t.Float64s()
		if err != nil {
			return nil, fmt.Errorf("output %q: %w", t.Name, err)
		}
		bits := 64
		if t.DType == onnxlite.Float || t.DType == onnxlite.Float16 || t.DType == onnxlite.BFloat16 {
			bits = 32
		}
		name := t.Name
		if i < len(m.Graph.Outputs) {
			name = m.Graph.Outputs[i].Name
		}
		res[i] = predictOutput{Name: name, Shape: t.Shape(), Data: numbers{vals, bits}}
		if res[i].Shape == nil {
			res[i].Shape = []int{}
		}
	}
	return res, nil
}

// writePredictJSON writes predict's JSON document, {"outputs": [...]}.
func writePredictJSON(w io.Writer, res []predictOutput) error {
	return json.NewEncoder(w).Encode(struct {
		Outputs []predictOutput `json:"outputs"`
	}{res})
}

// writePredictTable prints, sample by sample, each output's values; an output
// with one value per class name is printed as a class table with the largest
// value marked.
func writePredictTable(w io.Writer, outs []predictOutput, samples int, classes []string) {
	if samples < 1 {
		samples = 1
	}
	for s := 0; s < samples; s++ {
		if s > 0 {
			fmt.Fprintln(w)
		}
		fmt.Fprintf(w, "sample %d\n", s)
		for _, o := range outs {
			vals := o.Data.vals
			per := len(vals)
			lo := 0
			if len(o.Shape) > 0 && o.Shape[0] == samples {
				per = len(vals) / samples
				lo = s * per
			} else if s > 0 {
				continue // not batched: printed with sample 0
			}
			row := vals[lo : lo+per]
			if len(classes) == per && per > 0 {
				fmt.Fprintf(w, "  %s\n", o.Name)
				tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
				top := argmax(row)
				for j, v := range row {
					mark := ""
					if j == top {
						mark = "  <- top"
					}
					fmt.Fprintf(tw, "    %s\t%s%s\n", classes[j], formatValue(v, o.Data.bits), mark)
				}
				tw.Flush()
				continue
			}
			parts := make([]string, len(row))
			for j, v := range row {
				parts[j] = formatValue(v, o.Data.bits)
			}
			fmt.Fprintf(w, "  %s  [%s]\n", o.Name, strings.Join(parts, " "))
		}
	}
}

func formatValue(v float64, bits int) string {
	return strconv.FormatFloat(v, 'g', 6, bits)
}

// argmax is the index of the largest non-NaN value, -1 if there is none.
func argmax(v []float64) int {
	best := -1
	for i, x := range v {
		if math.IsNaN(x) {
			continue
		}
		if best < 0 || x > v[best] {
			best = i
		}
	}
	return best
}
