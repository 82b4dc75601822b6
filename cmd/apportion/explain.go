package main

import (
	"bytes"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"runtime"
	"strings"

	"golang.org/x/term"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/settingflags"
	"github.com/apportion/apportion/render"
	"github.com/apportion/apportion/samples"
)

// demoModel, when set, supplies a model and a sample to explain in place
// of the default demo scenario (when neither -model nor -demo is given).
// name is the sample's file name; its extension (.csv, .json, .npy or .pb)
// selects the reader, and the model is reported as "demo:"+name.
var demoModel func() (model []byte, sample []byte, name string)

// demoScenario returns the embedded demo scenario called name, the default
// one for "" (demoModel's, when set).
func demoScenario(name string) (*demo.Scenario, error) {
	if name == "" && demoModel != nil {
		model, sample, file := demoModel()
		return &demo.Scenario{Model: model, ModelFile: file, Sample: sample, SampleFile: file}, nil
	}
	return demo.Get(name)
}

// methodFlagNames are the flags that set explain.Settings, in the order
// they are applied.
var methodFlagNames = []explain.Field{
	explain.FieldMethod, explain.FieldTarget, explain.FieldOutput, explain.FieldLogits, explain.FieldBaseline,
	explain.FieldReference, explain.FieldSteps, explain.FieldRule, explain.FieldTolerance, explain.FieldSamples,
	explain.FieldNoise, explain.FieldSeed, explain.FieldAbs, explain.FieldVariant, explain.FieldReferenceRows,
	explain.FieldEstimator, explain.FieldCoalitions, explain.FieldKernelWidth, explain.FieldWindow, explain.FieldStride,
	explain.FieldSuperpixels, explain.FieldCompactness, explain.FieldLayer,
	explain.FieldLayerBaseline, explain.FieldBaselineToken,
}

// explainConfig holds explain's flags; settings are the method flags read
// by the library.
type explainConfig struct {
	modelPath string
	inputPath string    // the first -input
	inputs    multiFlag // every -input, one per graph input (explain)
	inputName string    // -input-name: the input to attribute to
	precision string    // -precision: float32 or float64
	groups    string
	format    string
	out       string
	demo      string
	seed      uint64 // -seed, which summarize also uses for the bootstrap
	sort      string
	patch     string // -patch HxW
	render    render.Options
	// vocab is -vocab, a vocabulary file for a model of token ids.
	vocab string
	// allowIncomplete accepts results whose completeness check fails.
	allowIncomplete bool

	settings explain.Settings
	set      map[string]bool // the flags given
	ignored  []string        // notes on the columns of CSV files the model does not read
}

// registerMethodFlags defines the flags that choose and tune the
// attribution method (settingflags, shared with the Beam pipeline), with
// the library's defaults; baselineDefault,
// baselineHelp and referenceHelp describe -baseline and -reference, whose
// defaults differ between commands (a baselineDefault of "" shows none, for
// a help text that says it). The values are read back through the flag set
// (see readSettings).
func registerMethodFlags(fs *flag.FlagSet, baselineDefault, baselineHelp, referenceHelp string) {
	var shared []explain.Field
	for _, f := range methodFlagNames {
		if f != explain.FieldSeed && f != explain.FieldBaseline && f != explain.FieldReference {
			shared = append(shared, f)
		}
	}
	settingflags.Define(fs, nil, shared...)
	fs.String("baseline", baselineDefault, baselineHelp)
	fs.String("reference", "", referenceHelp)
}

// readSettings sets the library's settings from the method flags given
// (the others keep the library's defaults) and checks them together. The
// seed is set by the caller.
func (c *explainConfig) readSettings(fs *flag.FlagSet) error {
	c.set = map[string]bool{}
	fs.Visit(func(f *flag.Flag) { c.set[f.Name] = true })
	c.settings = explain.Defaults()
	for _, f := range methodFlagNames {
		if f == explain.FieldSeed || !c.set[string(f)] {
			continue
		}
		v := fs.Lookup(string(f)).Value.String()
		if f == explain.FieldRule && v == "" {
			continue
		}
		if err := c.settings.Set(f, v); err != nil {
			return err
		}
	}
	return nil
}

func runExplain(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("explain", "[-model PATH -input PATH | -demo NAME] [flags]",
		"apportion explain -model model.onnx -input samples.csv -method ig -target top\n"+
			"\tapportion explain -demo welds -format png -out welds.png",
		"Attributes one output of the model, for each sample of -input, to the\n"+
			"sample's features. Integrated gradients (ig), expected gradients\n"+
			"(expected-grad) and Shapley values (shapley) report completeness: the\n"+
			"attributions should sum to the output minus the output at the baseline\n"+
			"(for shapley, the mean output over the reference rows), within\n"+
			"-tolerance; when they do not, the results are printed and the exit\n"+
			"status is 1 (0 with -allow-incomplete). A saturated output or one that\n"+
			"does not move gets a warning, and the bars are drawn on the scale of the\n"+
			"output's change. Shapley values, the local surrogate and occlusion only\n"+
			"run the model forward; with -groups, -patch or -superpixels they switch\n"+
			"whole groups on and off.\n\n"+
			"Without -model, explain runs an embedded, invented demo (-demo pumps,\n"+
			"welds or tickets, the last a text model explained per token). A model of\n"+
			"token ids is explained at its embedding, one attribution per token; -layer\n"+
			"NAME attributes to any value inside the model (inspect -values lists them).\n"+
			"-format png draws a heatmap for image-shaped samples ((H,W),\n"+
			"(1,H,W), or (C,H,W) with C ≤ 3: attributions summed over channels) and a\n"+
			"dot plot otherwise; it needs -out, and with several samples\n"+
			"writes one file per sample, the index before the extension\n"+
			"(-out a.png: a_0.png, a_1.png, ...).\n\n"+caution, stderr)
	var c explainConfig
	fs.StringVar(&c.modelPath, "model", "", "ONNX model `file` (default: the embedded demo model chosen by -demo)")
	fs.Var(&c.inputs, "input", "samples to explain: a .csv, .json, .npy or .pb `file` (required with -model; default: the demo's own sample); for a model of several inputs, one -input per input, in the model's order (a parameter of the graph, such as a target shape, read whole and shared by every sample)")
	fs.StringVar(&c.inputName, "input-name", "", "`name` of the model input to attribute to (default the first floating-point input); the other inputs are held at each sample's values")
	registerPrecisionFlag(fs, &c.precision)
	registerMethodFlags(fs, explain.DefaultBaselineText,
		"baseline `kind` for ig, surrogate and occlusion: zero, constant:V (every feature V), mean or median (of -reference; else, without -model, of the demo's reference set; else of -input), blur (Gaussian, σ = 2 pixels), blur:S (σ = S pixels), uniform:LO:HI (noise from -seed), or the path of a file of baseline samples (results averaged over them)",
		"reference samples `file` for expected-grad, shapley and -baseline mean (default without -model: the demo's reference set)")
	fs.Uint64Var(&c.seed, "seed", gradattr.DefaultSeed, "seed of the random methods")
	fs.StringVar(&c.groups, "groups", "", "JSON `file` of feature groups to report summed, in its order: {\"name\": [features], ...}, each feature an index from 0 or a feature name")
	fs.StringVar(&c.patch, "patch", "", "report image samples by patches of `HxW` pixels (all channels), tiled from the top left, instead of -groups")
	fs.StringVar(&c.format, "format", "table", "output format: table, json, csv, npy, png (needs -out) or html (a model of token ids: one page of every sample)")
	fs.StringVar(&c.out, "out", "", "write the result to `file` instead of standard output (png: file_0.png, file_1.png, ... for several samples)")
	fs.StringVar(&c.demo, "demo", "", "embedded invented demo `scenario` to explain without -model: pumps (the default), welds or tickets")
	fs.StringVar(&c.vocab, "vocab", "", "vocabulary `file` of a model of token ids, one token per line (id = line number from 0), for .txt inputs and token names (default: the model's own, from its metadata)")
	fs.BoolVar(&c.allowIncomplete, "allow-incomplete", false, "exit 0 even when a completeness check fails (the results are printed either way)")
	fs.IntVar(&c.render.Top, "top", 0, "show only the `K` features with the largest |attribution| in the table and the PNG (0: all, at most 64)")
	fs.StringVar(&c.sort, "sort", "model", "order of the features in the table and the PNG: model (the model's order), abs (largest |attribution| first) or value (largest attribution first)")
	if code, done := parseFlags(fs, args, stdout); done {
		return code
	}
	if len(c.inputs) > 0 {
		c.inputPath = c.inputs[0]
	}
	if err := c.readSettings(fs); err != nil {
		return fail(stderr, "explain", err)
	}
	if c.set["seed"] {
		if err := c.settings.Set(explain.FieldSeed, fs.Lookup("seed").Value.String()); err != nil {
			return fail(stderr, "explain", err)
		}
	}
	if msg := c.validate(); msg != "" {
		return usageError(stderr, "explain", "%s", msg)
	}
	if err := c.settings.Check(); err != nil {
		return fail(stderr, "explain", err)
	}

	ex, in, spec, err := c.load(runtime.GOMAXPROCS(0))
	if err != nil {
		return fail(stderr, "explain", err)
	}
	defer in.close()
	notes(stderr, "explain", c.ignored)
	c.render.Color = c.out == "" && colorTerminal(stdout)
	return c.writeExplanations(ex, in, spec, stdout, stderr)
}

// groupsPath is the file -format npy writes the group sums to: out with
// _groups before its extension (a.npy: a_groups.npy).
func groupsPath(out string) string {
	ext := filepath.Ext(out)
	return strings.TrimSuffix(out, ext) + "_groups" + ext
}

// writePNGs writes one PNG per explained sample to render.PNGPath(out, ...)
// of n samples in all; samples that failed get no file.
func writePNGs(out string, rep *explain.Report, n int, opt render.Options) error {
	for _, e := range rep.Explanations {
		if e.Err != nil {
			continue
		}
		var buf bytes.Buffer
		if err := render.PNG(&buf, rep, e, opt); err != nil {
			return fmt.Errorf("sample %d: %w", e.Index, err)
		}
		if err := os.WriteFile(render.PNGPath(out, e.Index, n), buf.Bytes(), 0o644); err != nil {
			return err
		}
	}
	return nil
}

// tally counts, over the batches of an input, the samples that could not
// be explained and the results whose completeness check failed.
type tally struct {
	failed, incomplete, results, total int
}

// add prints the samples of rep that could not be explained and those
// whose completeness check failed, and counts them.
func (t *tally) add(stderr io.Writer, rep *explain.Report) {
	for _, e := range rep.Explanations {
		t.total++
		if e.Err != nil {
			t.failed++
			fmt.Fprintf(stderr, "apportion explain: sample %d: %v\n", e.Index, e.Err)
			continue
		}
		t.results++
		if cp := e.Result.Completeness; cp != nil && cp.Judged && !cp.OK {
			t.incomplete++
			fmt.Fprintf(stderr, "apportion explain: sample %d: the completeness check failed: the attributions sum to %s, %s off f(x) − f(x′) = %s, a relative gap of %s above the tolerance %s\n",
				e.Index, render.Number(cp.Sum), render.Number(math.Abs(cp.Gap)), render.Number(cp.Expected), render.Number(cp.RelativeGap), render.Number(cp.Tolerance))
		}
	}
}

// reportFailed prints the samples of rep that could not be explained and
// those whose completeness check failed, and returns the exit status (see
// status).
func (c *explainConfig) reportFailed(stderr io.Writer, rep *explain.Report) int {
	var t tally
	t.add(stderr, rep)
	return c.status(stderr, &t)
}

// status says how many samples failed and how many results are
// incomplete, if any, and returns the exit status: 1 when a sample failed,
// or a check failed without -allow-incomplete.
func (c *explainConfig) status(stderr io.Writer, t *tally) int {
	status := exitOK
	if t.failed > 0 {
		fmt.Fprintf(stderr, "apportion explain: %d of %s failed\n", t.failed, render.Count(t.total, "sample", "samples"))
		status = exitFail
	}
	if t.incomplete > 0 {
		hint := "more -steps, another -rule, or -allow-incomplete to accept the results"
		if c.settings.Method == gradattr.MethodExpectedGradients {
			hint = "more -samples, or -allow-incomplete to accept the results"
		}
		if c.allowIncomplete {
			hint = "accepted with -allow-incomplete"
		} else {
			status = exitFail
		}
		fmt.Fprintf(stderr, "apportion explain: %d of %s incomplete (%s)\n", t.incomplete, render.Count(t.results, "result", "results"), hint)
	}
	return status
}

// errUsage marks a flag combination that is wrong, detected after parsing.
var errUsage = errors.New("usage")

type usageErr struct{ msg string }

func (e *usageErr) Error() string        { return e.msg }
func (e *usageErr) Is(target error) bool { return target == errUsage }

// flagName names a setting as a flag: -steps.
func flagName(f explain.Field) string { return "-" + string(f) }

// fail reports err: a usage error (a flag given wrong) with status 2, any
// other failure with status 1. Settings errors name the flags.
func fail(stderr io.Writer, cmd string, err error) int {
	var fe *explain.FieldError
	if errors.As(err, &fe) {
		if fe.Input {
			return failure(stderr, cmd, errors.New(fe.Wording(flagName)))
		}
		return usageError(stderr, cmd, "%s", fe.Wording(flagName))
	}
	if errors.Is(err, errUsage) {
		return usageError(stderr, cmd, "%v", err)
	}
	return failure(stderr, cmd, err)
}

// validate checks the flags that need no file; it returns a message for a
// usage error, or "".
func (c *explainConfig) validate() string {
	switch c.format {
	case "table", "json", "csv", "npy", "html":
	case "png":
		if c.out == "" {
			return "-format png needs -out, the file to write the image to (PNG is binary, not for a terminal)"
		}
	default:
		return fmt.Sprintf("-format must be table, json, csv, npy, png or html, got %q", c.format)
	}
	if c.format == "npy" && (c.groups != "" || c.patch != "") && c.out == "" {
		return "-format npy with groups writes two arrays: give -out FILE.npy for the attributions, and the group sums go to FILE_groups.npy"
	}
	if c.patch != "" {
		if c.groups != "" {
			return "-patch and -groups both group the features; give one"
		}
		if c.settings.Set(explain.FieldPatch, c.patch) != nil {
			return fmt.Sprintf("-patch must be HxW, two whole numbers of pixels such as 4x4, got %q", c.patch)
		}
	}
	if c.render.Top < 0 {
		return fmt.Sprintf("-top must be 0 (all features) or more, got %d", c.render.Top)
	}
	var err error
	if c.render.Sort, err = render.ParseSort(c.sort); err != nil {
		return "-sort " + err.Error()
	}
	// An embedded demo scenario supplies its own reference set.
	demoReference := c.modelPath == "" && (c.demo != "" || demoModel == nil)
	s := &c.settings
	if s.NeedsReference() && !s.Method.Reads(gradattr.ParamBaseline) && s.Reference == nil && !demoReference {
		return fmt.Sprintf("-method %s needs -reference, a file of reference samples", s.Method)
	}
	if c.demo != "" && c.modelPath != "" {
		return "-demo selects an embedded model and sample; it cannot be combined with -model"
	}
	if _, err := explain.ParsePrecision(c.precision); err != nil {
		return "-" + err.Error()
	}
	if c.inputPath == "" && c.modelPath != "" {
		return "-input is required"
	}
	return ""
}

// loadedModel is a model read from -model or an embedded demo, with the
// demo's files when it is one.
type loadedModel struct {
	model *explain.Model
	demo  *demo.Scenario // nil for -model
	// ignored notes, for each CSV file read by the model's feature names,
	// the columns the model does not read.
	ignored []string
}

// noteIgnored notes the columns of the file called name that the model
// does not read.
func (l *loadedModel) noteIgnored(name string, cols []string) {
	if n := ignoredNote(name, cols); n != "" {
		l.ignored = append(l.ignored, n)
	}
}

// ignoredNote says that the columns cols of the file called name are not
// read; "" when there are none.
func ignoredNote(name string, cols []string) string {
	if len(cols) == 0 {
		return ""
	}
	return fmt.Sprintf("%s: ignored the columns the model does not read: %s", name, strings.Join(cols, ", "))
}

// notes prints each note on stderr, prefixed with the command.
func notes(stderr io.Writer, cmd string, lines []string) {
	for _, n := range lines {
		fmt.Fprintf(stderr, "apportion %s: %s\n", cmd, n)
	}
}

// loadModel reads -model, or the embedded demo scenario called demoName.
func loadModel(modelPath, demoName string) (*loadedModel, error) {
	if modelPath != "" {
		m, err := explain.ReadModel(modelPath)
		return &loadedModel{model: m}, err
	}
	dm, err := demoScenario(demoName)
	if err != nil {
		return nil, &usageErr{err.Error()}
	}
	m, err := explain.Decode(dm.Model, "demo:"+dm.ModelFile, explain.DecodeOptions{})
	return &loadedModel{model: m, demo: dm}, err
}

// readDatasets reads the files the settings name (-reference, -baseline
// FILE), and the demo's reference set when the settings need one and name
// none.
func (l *loadedModel) readDatasets(s *explain.Settings) error {
	var err error
	switch {
	case s.Reference != nil && s.Reference.Batch == nil:
		s.Reference, err = l.reference(s.Reference.Name)
	case s.Reference == nil && s.NeedsReference():
		s.Reference, err = l.reference("")
	}
	if err != nil {
		return err
	}
	if b := &s.Baseline; b.Kind == gradattr.BaselineValues && b.Samples.Batch == nil {
		b.Samples, err = l.readSet(b.Samples.Name, explain.FieldBaseline)
	}
	return err
}

// reference reads the reference set at path, or the demo's when path is ""
// and the model is the demo's; nil when there is neither.
func (l *loadedModel) reference(path string) (*explain.Dataset, error) {
	if path != "" {
		return l.readSet(path, explain.FieldReference)
	}
	if l.demo == nil || l.demo.Reference == nil {
		return nil, nil
	}
	name, raw := l.demo.ReferenceFile, l.demo.Reference
	spec, err := l.model.Input()
	if err != nil {
		return nil, err
	}
	b, err := samples.Read(bytes.NewReader(raw), name, spec, l.model.ReadOptions(false))
	if err != nil {
		return nil, fmt.Errorf("demo reference set: %w", err)
	}
	return explain.NewDataset("demo:"+name, raw, b), nil
}

// readSet reads the file at path as samples for the model; field names the
// flag that gave it, in errors.
func (l *loadedModel) readSet(path string, field explain.Field) (*explain.Dataset, error) {
	spec, err := l.model.Input()
	if err != nil {
		return nil, err
	}
	raw, err := samples.ReadLimited(path)
	if field == explain.FieldBaseline && errors.Is(err, os.ErrNotExist) {
		return nil, &usageErr{fmt.Sprintf("-baseline must be %s, or the path of a file of baseline samples; got %q, which is neither (there is no such file)", explain.BaselineWords, path)}
	}
	if err != nil {
		return nil, fmt.Errorf("%s: input %s (for %q): %w", flagName(field), path, spec.Name, err)
	}
	b, err := samples.Read(bytes.NewReader(raw), path, spec, l.model.ReadOptions(false))
	if err != nil {
		return nil, fmt.Errorf("%s: %w", flagName(field), err)
	}
	l.noteIgnored(path, b.Ignored)
	return explain.NewDataset(path, raw, b), nil
}

// load reads the model and the first batches of the samples, compiles
// the model with parallel goroutines per call, and returns the explainer,
// the samples and their spec. The samples are read whole when the output
// (.npy) or the baseline (the mean of the samples themselves) needs them
// all; otherwise a long input is a stream. A model's other inputs are read
// whole and held at each sample's values.
func (c *explainConfig) load(parallel int) (*explain.Explainer, *inputBatches, samples.Spec, error) {
	l, err := loadModel(c.modelPath, c.demo)
	if err != nil {
		return nil, nil, samples.Spec{}, err
	}
	m := l.model
	m.InputName = c.inputName
	if err := readVocabulary(m, c.vocab); err != nil {
		return nil, nil, samples.Spec{}, err
	}
	spec, err := m.Input()
	if err != nil {
		return nil, nil, spec, err
	}
	if _, err := m.Output(c.settings.Output); err != nil {
		return nil, nil, spec, err
	}
	held, open, err := c.readOthers(m, spec)
	if err != nil {
		return nil, nil, spec, err
	}
	path := c.inputPath
	if path != "" {
		path = c.inputs[indexOf(m, spec.Name, len(c.inputs))]
	}
	in, err := openInput(l, path, spec, m.ReadOptions(true))
	if err != nil {
		return nil, nil, spec, err
	}
	ex, err := c.explainer(l, spec, in, open, held, parallel)
	if err != nil {
		in.close()
	}
	c.ignored = l.ignored
	return ex, in, spec, err
}

// explainer compiles the model for the input's shape (and the open shapes
// of the other inputs) and makes the explainer of c's settings, holding
// the other inputs.
func (c *explainConfig) explainer(l *loadedModel, spec samples.Spec, in *inputBatches, open map[string][]int, held []*samples.Batch, parallel int) (*explain.Explainer, error) {
	m := l.model
	dtype, err := explain.ParsePrecision(c.precision)
	if err != nil {
		return nil, err
	}
	first := in.first()
	l.noteIgnored(first.Name, first.Ignored)
	for name, shape := range explain.OpenShapes(spec, first) {
		open[name] = shape
	}
	if err := m.Compile(explain.CompileOptions{InputShapes: open, Parallel: parallel, DType: dtype}); err != nil {
		return nil, err
	}
	if err := l.readDatasets(&c.settings); err != nil {
		return nil, err
	}
	s := &c.settings
	if s.NeedsReference() && !s.Method.Reads(gradattr.ParamBaseline) && s.Reference == nil {
		return nil, &usageErr{fmt.Sprintf("-method %s needs -reference, a file of reference samples", s.Method)}
	}
	// A mean or median baseline without a reference set is the input's own.
	ofInput := s.Method.Reads(gradattr.ParamBaseline) && s.NeedsReference() && s.Reference == nil
	if !in.whole() && (c.format == "npy" || c.format == "html" || ofInput) {
		if err := in.readWhole(); err != nil {
			return nil, err
		}
	}
	head, err := m.Head(s.Output, s.Logits)
	if err != nil {
		return nil, err
	}
	if c.groups != "" {
		size := samples.Product(head.InputShape())
		names := m.Meta.Features
		if len(names) != size {
			names = in.first().Features // a CSV header read by position
		}
		f, err := os.Open(c.groups)
		if err != nil {
			return nil, fmt.Errorf("-groups: %w", err)
		}
		s.Groups, err = explain.ReadGroups(f, size, names)
		f.Close()
		if err != nil {
			return nil, fmt.Errorf("-groups %s: %w", c.groups, err)
		}
	}
	if shape := head.InputShape(); c.patch != "" && len(shape) < 2 {
		return nil, &usageErr{fmt.Sprintf("-patch %s needs samples with at least two axes (height, width), got shape %s", c.patch, samples.ShapeString(shape))}
	}
	ex, err := explain.New(m, head, *s)
	if err == nil && held != nil {
		err = ex.Hold(held)
	}
	return ex, err
}

// indexOf returns the position of the input called name among the model's
// inputs when every input has a file (given files), and 0 otherwise.
func indexOf(m *explain.Model, name string, given int) int {
	feeds := m.Inputs()
	if given != len(feeds) {
		return 0
	}
	for i, f := range feeds {
		if f.Name == name {
			return i
		}
	}
	return 0
}

// readOthers reads the files of the model's inputs other than the one
// explained (spec), when the model has several: one -input per graph
// input, in graph order. It returns them for Explainer.Hold (nil at the
// explained input) and the per-sample shapes of those declared open.
func (c *explainConfig) readOthers(m *explain.Model, spec samples.Spec) ([]*samples.Batch, map[string][]int, error) {
	feeds := m.Inputs()
	open := map[string][]int{}
	if len(feeds) == 1 && len(c.inputs) <= 1 {
		return nil, open, nil
	}
	if len(c.inputs) != len(feeds) {
		names := make([]string, len(feeds))
		for i, f := range feeds {
			names[i] = f.Name
		}
		return nil, nil, &usageErr{fmt.Sprintf("the model has %d inputs (%s): give one -input per input, in that order, got %d", len(feeds), strings.Join(names, ", "), len(c.inputs))}
	}
	held := make([]*samples.Batch, len(feeds))
	for i, vi := range feeds {
		if vi.Name == spec.Name {
			continue
		}
		other := samples.SpecOf(vi)
		b, err := samples.ReadFile(c.inputs[i], other, samples.Options{})
		if err != nil {
			return nil, nil, err
		}
		if err := b.FirstBad(); err != nil {
			return nil, nil, fmt.Errorf("input %s (for %q): %w", c.inputs[i], vi.Name, err)
		}
		held[i] = b
		for name, shape := range explain.OpenShapes(other, b) {
			open[name] = shape
		}
	}
	return held, open, nil
}

// registerPrecisionFlag defines -precision, the engine's element type.
func registerPrecisionFlag(fs *flag.FlagSet, p *string) {
	fs.StringVar(p, "precision", "float32", "the engine's floating-point `type`: float32, or float64 for values beyond the float32 range and reference-grade results")
}

// colorTerminal reports whether w is a terminal that shows colour: a
// character device, with NO_COLOR unset or empty (no-color.org) and TERM
// set to something other than dumb (common practice).
func colorTerminal(w io.Writer) bool {
	f, ok := w.(*os.File)
	if !ok || !term.IsTerminal(int(f.Fd())) {
		return false
	}
	t := os.Getenv("TERM")
	return os.Getenv("NO_COLOR") == "" && t != "" && t != "dumb"
}

// progress reports finished samples of a long batch on w when w is a
// terminal, and does nothing otherwise (a file or a pipe gets no noise).
func progress(w io.Writer) func(done, total int) {
	f, ok := w.(*os.File)
	if !ok {
		return nil
	}
	st, err := f.Stat()
	if err != nil || st.Mode()&os.ModeCharDevice == 0 {
		return nil
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

// readVocabulary sets the vocabulary of a model of token ids from the file
// at path (one token per line, id = line number from 0), when path is
// given.
func readVocabulary(m *explain.Model, path string) error {
	if path == "" {
		return nil
	}
	raw, err := samples.ReadLimited(path)
	if err != nil {
		return fmt.Errorf("-vocab: %w", err)
	}
	v, err := samples.ReadVocabulary(bytes.NewReader(raw))
	if err != nil {
		return fmt.Errorf("-vocab %s: %w", path, err)
	}
	m.Meta.Vocabulary = v.Tokens
	return nil
}
