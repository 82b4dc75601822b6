package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"runtime"
	"strconv"
	"strings"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/modelmeta"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// demoModel, when set, supplies a model and a sample to explain when neither
// -model nor -demo is given, in place of the default demo scenario. name is
// the sample's file name; its extension (.csv, .json, .npy or .pb) selects
// the reader, and the model is reported as "demo:"+name.
var demoModel func() (model []byte, sample []byte, name string)

// demoFiles is an embedded demo scenario's model, sample and reference set.
// The file names' extensions select the readers.
type demoFiles struct {
	model         []byte
	modelFile     string // reported as "demo:"+modelFile
	sample        []byte
	sampleFile    string
	reference     []byte // nil when the scenario has none
	referenceFile string
}

// demoScenario, when set, returns the embedded demo scenario called name;
// the empty name is the default scenario.
var demoScenario func(name string) (*demoFiles, error)

// The defaults of the settings that are not a method's parameters.
const (
	defaultMethod   = gradattr.MethodIntegratedGradients
	defaultTarget   = "top"
	defaultBaseline = "zero"
	defaultSteps    = "auto"
)

// explainConfig holds explain's flags, validated.
type explainConfig struct {
	modelPath  string
	inputPath  string
	output     string
	methodText string
	method     gradattr.Method // parsed from methodText
	target     int             // gradattr.TargetTop for "top"
	targetText string
	logits     bool
	baseline   string
	reference  string
	steps      int // 0: automatic
	stepsText  string
	rule       gradattr.Rule
	ruleText   string
	tolerance  float64
	samples    int
	noise      float64
	seed       uint64
	groups     string
	format     string
	out        string
	demo       string

	toleranceSet bool            // -tolerance was given
	set          map[string]bool // the flags given
}

func runExplain(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("explain", "[-model PATH -input PATH | -demo NAME] [flags]",
		"apportion explain -model model.onnx -input samples.csv -method ig -target top\n"+
			"\tapportion explain -demo welds -format png -out welds.png",
		"Attributes one output of the model, for each sample of -input, to the\n"+
			"sample's features. Integrated gradients (ig) and expected gradients\n"+
			"(expected-grad) report completeness: the attributions should sum to the\n"+
			"output minus the output at the baseline, within -tolerance.\n\n"+
			"Without -model, explain runs an embedded, invented demo (-demo pumps or\n"+
			"welds). -format png draws a heatmap for image-shaped samples ((H,W),\n"+
			"(1,H,W), or (C,H,W) with C ≤ 3: attributions summed over channels) and a\n"+
			"signed bar chart otherwise; it needs -out, and with several samples\n"+
			"writes one file per sample, the index before the extension\n"+
			"(-out a.png: a_0.png, a_1.png, ...).\n\n"+caution, stderr)
	var c explainConfig
	fs.StringVar(&c.modelPath, "model", "", "ONNX model `file` (default: the embedded demo model chosen by -demo)")
	fs.StringVar(&c.inputPath, "input", "", "samples to explain: a .csv, .json, .npy or .pb `file` (required with -model; default: the demo's own sample)")
	registerMethodFlags(fs, &c,
		"baseline `kind` for ig: zero, mean (of -reference; else, without -model, of the demo's reference set; else of -input), blur (Gaussian, σ = 2 pixels), blur:S (σ = S pixels), or the path of a file of baseline samples (results averaged over them)",
		"reference samples `file` for expected-grad and -baseline mean (default without -model: the demo's reference set)")
	fs.Uint64Var(&c.seed, "seed", gradattr.DefaultSeed, "seed of the random methods")
	fs.StringVar(&c.groups, "groups", "", "JSON `file` naming groups of features to report together")
	fs.StringVar(&c.format, "format", "table", "output format: table, json, csv, npy or png (png needs -out)")
	fs.StringVar(&c.out, "out", "", "write the result to `file` instead of standard output (png: file_0.png, file_1.png, ... for several samples)")
	fs.StringVar(&c.demo, "demo", "", "embedded invented demo `scenario` to explain without -model: pumps (the default) or welds")
	if code, done := parseFlags(fs, args, stdout); done {
		return code
	}
	c.set = map[string]bool{}
	fs.Visit(func(f *flag.Flag) { c.set[f.Name] = true })
	c.toleranceSet = c.set["tolerance"]
	if msg := c.validate(); msg != "" {
		return usageError(stderr, "explain", "%s", msg)
	}

	src, err := c.load()
	if err != nil {
		if errors.Is(err, errUsage) {
			return usageError(stderr, "explain", "%v", err)
		}
		return failure(stderr, "explain", err)
	}
	rep, err := explainAll(context.Background(), &c, src, progress(stderr))
	if err != nil {
		if errors.Is(err, errUsage) {
			return usageError(stderr, "explain", "%v", err)
		}
		return failure(stderr, "explain", err)
	}

	if c.format == "png" {
		if _, err := writeExplainPNG(&c, rep); err != nil {
			return failure(stderr, "explain", err)
		}
		return reportFailed(stderr, rep)
	}
	w := stdout
	var buf bytes.Buffer
	if c.out != "" {
		w = &buf
	}
	if err := renderExplanation(w, &c, rep); err != nil {
		return failure(stderr, "explain", err)
	}
	if c.out != "" {
		if err := os.WriteFile(c.out, buf.Bytes(), 0o644); err != nil {
			return failure(stderr, "explain", err)
		}
	}
	return reportFailed(stderr, rep)
}

// reportFailed prints the samples that could not be explained and returns
// the exit status.
func reportFailed(stderr io.Writer, rep *explainReport) int {
	failed := 0
	for _, e := range rep.Explanations {
		if e.err != nil {
			failed++
			fmt.Fprintf(stderr, "apportion explain: sample %d: %v\n", e.Index, e.err)
		}
	}
	if failed > 0 {
		fmt.Fprintf(stderr, "apportion explain: %d of %d samples failed\n", failed, len(rep.Explanations))
		return exitFail
	}
	return exitOK
}

// errUsage marks a flag combination that is wrong, detected after parsing.
var errUsage = errors.New("usage")

type usageErr struct{ msg string }

func (e *usageErr) Error() string        { return e.msg }
func (e *usageErr) Is(target error) bool { return target == errUsage }

// validate checks the flag values that need no file; it returns a message
// for a usage error, or "".
func (c *explainConfig) validate() string {
	m, err := gradattr.ParseMethod(c.methodText)
	if err != nil {
		return fmt.Sprintf("-method must be one of %s, got %q", gradattr.MethodNames(), c.methodText)
	}
	c.method = m
	switch c.format {
	case "table", "json", "csv", "npy":
	case "png":
		if c.out == "" {
			return "-format png needs -out, the file to write the image to (PNG is binary, not for a terminal)"
		}
	default:
		return fmt.Sprintf("-format must be table, json, csv, npy or png, got %q", c.format)
	}
	if c.targetText == "top" {
		c.target = gradattr.TargetTop
	} else {
		n, err := strconv.Atoi(c.targetText)
		if err != nil || n < 0 {
			return fmt.Sprintf("-target must be a non-negative index or top, got %q", c.targetText)
		}
		c.target = n
	}
	if c.stepsText == "auto" {
		c.steps = 0
	} else {
		n, err := strconv.Atoi(c.stepsText)
		if err != nil || n < 1 || n > gradattr.MaxPointsLimit {
			return fmt.Sprintf("-steps must be auto or a number from 1 to %d, got %q", gradattr.MaxPointsLimit, c.stepsText)
		}
		c.steps = n
	}
	if c.ruleText != "" {
		r, err := gradattr.ParseRule(c.ruleText)
		if err != nil {
			return fmt.Sprintf("-rule: %v", err)
		}
		c.rule = r
	}
	if math.IsNaN(c.tolerance) || c.tolerance <= 0 || c.tolerance >= 1 {
		return fmt.Sprintf("-tolerance must be in (0, 1), got %v", c.tolerance)
	}
	if c.samples < 1 || c.samples > gradattr.MaxSamplesLimit {
		return fmt.Sprintf("-samples must be from 1 to %d, got %d", gradattr.MaxSamplesLimit, c.samples)
	}
	if math.IsNaN(c.noise) || math.IsInf(c.noise, 0) || c.noise <= 0 {
		return fmt.Sprintf("-noise must be a positive number, got %v", c.noise)
	}
	if msg := c.checkParams(); msg != "" {
		return msg
	}
	if c.reference != "" && c.method == gradattr.MethodIntegratedGradients && c.baseline != "mean" {
		return "-reference with -method integrated-gradients is the set -baseline mean averages; give -baseline mean too"
	}
	// An embedded demo scenario supplies its own reference set.
	demoReference := c.modelPath == "" && demoScenario != nil && (c.demo != "" || demoModel == nil)
	if c.method == gradattr.MethodExpectedGradients && c.reference == "" && !demoReference {
		return "-method expected-gradients needs -reference, a file of reference samples"
	}
	if c.demo != "" && c.modelPath != "" {
		return "-demo selects an embedded model and sample; it cannot be combined with -model"
	}
	haveDemo := demoModel != nil || demoScenario != nil
	if c.modelPath == "" && !haveDemo {
		return "-model is required"
	}
	if c.inputPath == "" && (c.modelPath != "" || !haveDemo) {
		return "-input is required"
	}
	return ""
}

// source is the model and the samples explain works on.
type source struct {
	modelName string // path, or "demo:"+name
	sha256    string
	model     *onnxlite.Model
	net       *network
	spec      samples.Spec
	head      gradattr.Model
	output    string
	samples   *samples.Batch
	reference *samples.Batch // nil without -reference
	// meta holds the model's names; features, the feature names labels
	// use: the model's, else the input's CSV header.
	meta     modelmeta.Meta
	features []string
}

func (c *explainConfig) load() (*source, error) {
	src := &source{}
	var raw, demoSample []byte
	var demoName string
	var dm *demoFiles
	var err error
	if c.modelPath == "" {
		switch {
		case c.demo == "" && demoModel != nil:
			dm = &demoFiles{}
			dm.model, dm.sample, dm.sampleFile = demoModel()
		case demoScenario == nil:
			return nil, &usageErr{"-demo: this build has no embedded demo"}
		default:
			if dm, err = demoScenario(c.demo); err != nil {
				return nil, &usageErr{err.Error()}
			}
		}
		raw, demoSample, demoName = dm.model, dm.sample, dm.sampleFile
		src.modelName = "demo:" + dm.modelFile
		if dm.modelFile == "" {
			src.modelName = "demo:" + demoName
		}
		src.model, err = decodeModelBytes(raw, src.modelName, "")
	} else {
		src.modelName = c.modelPath
		raw, src.model, err = readModelFile(c.modelPath)
	}
	if err != nil {
		return nil, err
	}
	sum := sha256.Sum256(raw)
	src.sha256 = hex.EncodeToString(sum[:])
	if err := src.prepare(c); err != nil {
		return nil, err
	}
	if c.inputPath == "" {
		src.samples, err = samples.Read(bytes.NewReader(demoSample), demoName, src.spec, src.readOptions(true))
	} else {
		src.samples, err = samples.ReadFile(c.inputPath, src.spec, src.readOptions(true))
	}
	if err != nil {
		return nil, err
	}
	if err := src.finish(c); err != nil {
		return nil, err
	}
	if c.reference == "" && c.needsReference() && dm != nil {
		if dm.reference == nil {
			if c.method == gradattr.MethodExpectedGradients {
				return nil, &usageErr{"-method expected-gradients needs -reference, a file of reference samples"}
			}
		} else if src.reference, err = samples.Read(bytes.NewReader(dm.reference), dm.referenceFile, src.spec, src.readOptions(false)); err != nil {
			return nil, fmt.Errorf("demo reference set: %w", err)
		} else {
			c.reference = "demo:" + dm.referenceFile // recorded in the JSON settings
		}
	}
	return src, nil
}

// labels names the features of one sample (see modelmeta.Meta.Labels).
func (src *source) labels() []string {
	m := src.meta
	m.Features = src.features
	return m.Labels(src.samples.SampleShape())
}

// readOptions are the options samples are read with: by the model's
// feature names, keeping bad samples for the caller with keepBad.
func (src *source) readOptions(keepBad bool) samples.Options {
	return samples.Options{KeepBad: keepBad, Features: src.meta.Features}
}

// prepare selects the input and the output, and reads the names the model's
// metadata gives to features and classes.
func (src *source) prepare(c *explainConfig) error {
	feeds := feedInputs(src.model.Graph)
	if len(feeds) != 1 {
		names := make([]string, len(feeds))
		for i, f := range feeds {
			names[i] = f.Name
		}
		return fmt.Errorf("explain needs a model with one runtime input, this one has %d (%s)", len(feeds), strings.Join(names, ", "))
	}
	src.spec = samples.SpecOf(feeds[0])
	src.output = c.output
	if src.output == "" {
		if len(src.model.Graph.Outputs) == 0 {
			return fmt.Errorf("the model has no outputs")
		}
		src.output = src.model.Graph.Outputs[0].Name
	} else {
		found := false
		var names []string
		for _, o := range src.model.Graph.Outputs {
			found = found || o.Name == src.output
			names = append(names, o.Name)
		}
		if !found {
			return &usageErr{fmt.Sprintf("-output %q is not an output of the model (outputs: %s)", src.output, strings.Join(names, ", "))}
		}
	}
	src.meta = modelmeta.Read(src.model)
	src.features = src.meta.Features
	return nil
}

// finish compiles the model for the samples read, selects the explained
// output and reads the reference set.
func (src *source) finish(c *explainConfig) error {
	if src.features == nil {
		src.features = src.samples.Features
	}
	var err error
	src.net, err = compileModel(src.model, openShapes(src.spec, src.samples), runtime.GOMAXPROCS(0))
	if err != nil {
		return err
	}
	src.head, err = src.net.head(src.output, c.logits)
	if err != nil {
		return err
	}
	if got, want := src.samples.SampleSize(), samples.Product(src.head.InputShape()); got != want {
		return fmt.Errorf("input %s: expected samples of shape %s (%d values), got %s (%d values)",
			src.samples.Name, samples.ShapeString(src.head.InputShape()), want, samples.ShapeString(src.samples.SampleShape()), got)
	}
	if c.reference != "" {
		var err error
		src.reference, err = samples.ReadFile(c.reference, src.spec, src.readOptions(false))
		if err != nil {
			return fmt.Errorf("-reference: %w", err)
		}
	}
	return nil
}

// explanation is the result for one sample.
type explanation struct {
	Index     int
	Value     []float64 // the sample
	Result    *gradattr.Result
	Baselines []float64 // model outputs at the baseline, when there is one
	Grouped   *gradattr.GroupedResult
	err       error
}

// explainReport is what renderers print.
type explainReport struct {
	src          *source
	options      gradattr.Options
	groups       []gradattr.Group
	Explanations []explanation
}

func explainAll(ctx context.Context, c *explainConfig, src *source, tick func(done, total int)) (*explainReport, error) {
	rep := &explainReport{src: src}
	plan, err := c.plan(src)
	if err != nil {
		return nil, err
	}
	rep.groups, rep.options = plan.groups, plan.options
	for i := 0; i < src.samples.Samples; i++ {
		x := src.samples.Sample(i)
		e := explanation{Index: i, Value: x}
		if err := src.samples.Bad[i]; err != nil {
			e.err = err
		} else if err := samples.CheckFinite(x); err != nil {
			e.err = err
		} else if e.Result, e.err = c.attribute(ctx, src, x, plan); e.err == nil {
			if b := plan.options.Baselines; len(b) == 1 {
				e.Baselines = baselineOutputs(ctx, src, x, b[0])
			}
			if plan.groups != nil {
				e.Grouped, e.err = e.Result.Grouped(plan.groups)
			}
		}
		rep.Explanations = append(rep.Explanations, e)
		tick(i+1, src.samples.Samples)
	}
	return rep, nil
}

// baselineOutputs evaluates the model at the baseline of sample x; nil when
// that fails (the attribution itself has succeeded, so the sample is kept).
func baselineOutputs(ctx context.Context, src *source, x []float64, b gradattr.Baseline) []float64 {
	xb, err := b.Build(x, src.samples.SampleShape())
	if err != nil {
		return nil
	}
	out, err := src.head.Forward(ctx, xb, 1)
	if err != nil {
		return nil
	}
	return out
}

// attribute runs the selected method on one sample.
func (c *explainConfig) attribute(ctx context.Context, src *source, x []float64, plan *methodPlan) (*gradattr.Result, error) {
	return gradattr.Attribute(ctx, src.head, x, c.target, plan.options)
}

// progress reports finished samples of a long batch on w when w is a
// terminal, and does nothing otherwise (a file or a pipe gets no noise).
func progress(w io.Writer) func(done, total int) {
	f, ok := w.(*os.File)
	if !ok {
		return func(int, int) {}
	}
	st, err := f.Stat()
	if err != nil || st.Mode()&os.ModeCharDevice == 0 {
		return func(int, int) {}
	}
	return func(done, total int) {
		if total < 2 {
			return
		}
		fmt.Fprintf(w, "\rexplained %d of %d samples", done, total)
		if done == total {
			fmt.Fprint(w, "\r\033[K")
		}
	}
}
