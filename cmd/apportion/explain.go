package main

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"runtime"
	"strconv"
	"strings"

	"golang.org/x/term"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
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
	explain.FieldNoise, explain.FieldSeed, explain.FieldAbs, explain.FieldVariant,
}

// explainConfig holds explain's flags; settings are the method flags read
// by the library.
type explainConfig struct {
	modelPath string
	inputPath string
	groups    string
	format    string
	out       string
	demo      string
	seed      uint64 // -seed, which summarize also uses for the bootstrap
	sort      string
	patch     string // -patch HxW
	render    render.Options
	// allowIncomplete accepts results whose completeness check fails.
	allowIncomplete bool

	settings explain.Settings
	set      map[string]bool // the flags given
	ignored  []string        // notes on the columns of CSV files the model does not read
}

// registerMethodFlags defines the flags that choose and tune the
// attribution method, with the library's defaults; baselineDefault,
// baselineHelp and referenceHelp describe -baseline and -reference, whose
// defaults differ between commands (a baselineDefault of "" shows none, for
// a help text that says it). The values are read back through the flag set
// (see readSettings).
func registerMethodFlags(fs *flag.FlagSet, baselineDefault, baselineHelp, referenceHelp string) {
	var aliases []string
	for _, m := range gradattr.Methods() {
		aliases = append(aliases, m.Alias())
	}
	ig, eg, sg := gradattr.MethodIntegratedGradients.Defaults(), gradattr.MethodExpectedGradients.Defaults(), gradattr.MethodSmoothGrad.Defaults()
	fs.String("output", "", "`name` of the model output to explain (default the first)")
	fs.String("method", explain.DefaultMethod.Alias(), "attribution method: "+strings.Join(aliases, ", ")+" (or the canonical names "+gradattr.MethodNames()+")")
	fs.String("target", explain.DefaultTargetText, "output element to explain: an index `N`, or top for the largest")
	fs.Bool("logits", false, "explain the input of the Softmax, LogSoftmax or Sigmoid that produces the output (the logits)")
	fs.String("baseline", baselineDefault, baselineHelp)
	fs.String("reference", "", referenceHelp)
	fs.String("steps", explain.DefaultStepsText, "integration points for ig: a number `N` (at least 2 with the trapezoid rule, 1 with the others), or auto to refine until -tolerance")
	fs.String("rule", "", "quadrature `rule` for ig: trapezoid, left, right, midpoint or gauss-legendre (default trapezoid)")
	fs.Float64("tolerance", ig.Tolerance, fmt.Sprintf("relative completeness gap `R` to meet; expected-grad, complete only in expectation, uses %v unless given", eg.Tolerance))
	fs.Int("samples", sg.Samples, "noisy copies (smoothgrad) or baseline draws (expected-grad) `N`")
	fs.Float64("noise", sg.Noise, "smoothgrad noise level `R`: σ / (max x − min x)")
	fs.Bool("abs", false, "grad: the gradient's absolute value |∂f/∂x| (Simonyan et al. 2013), not its sign")
	fs.String("variant", gradattr.VariantMean.String(), "smoothgrad aggregate of the noisy copies' gradients: mean, squared (mean of squares) or variance")
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
			"sample's features. Integrated gradients (ig) and expected gradients\n"+
			"(expected-grad) report completeness: the attributions should sum to the\n"+
			"output minus the output at the baseline, within -tolerance; when they do\n"+
			"not, the results are printed and the exit status is 1 (0 with\n"+
			"-allow-incomplete). A saturated output or one that does not move gets a\n"+
			"warning, and the bars are drawn on the scale of the output's change.\n\n"+
			"Without -model, explain runs an embedded, invented demo (-demo pumps or\n"+
			"welds). -format png draws a heatmap for image-shaped samples ((H,W),\n"+
			"(1,H,W), or (C,H,W) with C ≤ 3: attributions summed over channels) and a\n"+
			"dot plot otherwise; it needs -out, and with several samples\n"+
			"writes one file per sample, the index before the extension\n"+
			"(-out a.png: a_0.png, a_1.png, ...).\n\n"+caution, stderr)
	var c explainConfig
	fs.StringVar(&c.modelPath, "model", "", "ONNX model `file` (default: the embedded demo model chosen by -demo)")
	fs.StringVar(&c.inputPath, "input", "", "samples to explain: a .csv, .json, .npy or .pb `file` (required with -model; default: the demo's own sample)")
	registerMethodFlags(fs, explain.DefaultBaselineText,
		"baseline `kind` for ig: zero, constant:V (every feature V), mean or median (of -reference; else, without -model, of the demo's reference set; else of -input), blur (Gaussian, σ = 2 pixels), blur:S (σ = S pixels), uniform:LO:HI (noise from -seed), or the path of a file of baseline samples (results averaged over them)",
		"reference samples `file` for expected-grad and -baseline mean (default without -model: the demo's reference set)")
	fs.Uint64Var(&c.seed, "seed", gradattr.DefaultSeed, "seed of the random methods")
	fs.StringVar(&c.groups, "groups", "", "JSON `file` of feature groups to report summed, in its order: {\"name\": [features], ...}, each feature an index from 0 or a feature name")
	fs.StringVar(&c.patch, "patch", "", "report image samples by patches of `HxW` pixels (all channels), tiled from the top left, instead of -groups")
	fs.StringVar(&c.format, "format", "table", "output format: table, json, csv, npy or png (png needs -out)")
	fs.StringVar(&c.out, "out", "", "write the result to `file` instead of standard output (png: file_0.png, file_1.png, ... for several samples)")
	fs.StringVar(&c.demo, "demo", "", "embedded invented demo `scenario` to explain without -model: pumps (the default) or welds")
	fs.BoolVar(&c.allowIncomplete, "allow-incomplete", false, "exit 0 even when a completeness check fails (the results are printed either way)")
	fs.IntVar(&c.render.Top, "top", 0, "show only the `K` features with the largest |attribution| in the table and the PNG (0: all, at most 64)")
	fs.StringVar(&c.sort, "sort", "model", "order of the features in the table and the PNG: model (the model's order), abs (largest |attribution| first) or value (largest attribution first)")
	if code, done := parseFlags(fs, args, stdout); done {
		return code
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

	ex, batch, err := c.load(runtime.GOMAXPROCS(0))
	if err != nil {
		return fail(stderr, "explain", err)
	}
	notes(stderr, "explain", c.ignored)
	rep, err := ex.Explain(context.Background(), batch, progress(stderr))
	if err != nil {
		return fail(stderr, "explain", err)
	}

	c.render.Color = c.out == "" && colorTerminal(stdout)
	if c.format == "png" {
		if err := writePNGs(c.out, rep, c.render); err != nil {
			return failure(stderr, "explain", err)
		}
		return c.reportFailed(stderr, rep)
	}
	w := stdout
	var buf bytes.Buffer
	if c.out != "" {
		w = &buf
	}
	switch c.format {
	case "json":
		err = rep.WriteJSON(w)
	case "csv":
		err = render.CSV(w, rep)
	case "npy":
		err = render.NPY(w, rep)
	default:
		err = render.Table(w, rep, c.render)
	}
	if err != nil {
		return failure(stderr, "explain", err)
	}
	if c.out != "" {
		if err := os.WriteFile(c.out, buf.Bytes(), 0o644); err != nil {
			return failure(stderr, "explain", err)
		}
	}
	if c.format == "npy" && rep.Settings.Groups != nil {
		// The group sums are a second array, in a file of their own.
		var g bytes.Buffer
		path := groupsPath(c.out)
		if err := render.GroupsNPY(&g, rep); err != nil {
			return failure(stderr, "explain", err)
		}
		if err := os.WriteFile(path, g.Bytes(), 0o644); err != nil {
			return failure(stderr, "explain", err)
		}
		fmt.Fprintf(stderr, "apportion explain: wrote the group sums, %s × %s, to %s\n", render.Count(len(rep.Explanations), "sample", "samples"), render.Count(len(rep.Settings.Groups), "group", "groups"), path)
	}
	return c.reportFailed(stderr, rep)
}

// groupsPath is the file -format npy writes the group sums to: out with
// _groups before its extension (a.npy: a_groups.npy).
func groupsPath(out string) string {
	ext := filepath.Ext(out)
	return strings.TrimSuffix(out, ext) + "_groups" + ext
}

// writePNGs writes one PNG per explained sample to render.PNGPath(out, ...);
// samples that failed get no file.
func writePNGs(out string, rep *explain.Report, opt render.Options) error {
	for _, e := range rep.Explanations {
		if e.Err != nil {
			continue
		}
		var buf bytes.Buffer
		if err := render.PNG(&buf, rep, e, opt); err != nil {
			return fmt.Errorf("sample %d: %w", e.Index, err)
		}
		if err := os.WriteFile(render.PNGPath(out, e.Index, len(rep.Explanations)), buf.Bytes(), 0o644); err != nil {
			return err
		}
	}
	return nil
}

// reportFailed prints the samples that could not be explained and those
// whose completeness check failed, and returns the exit status: 1 when a
// sample failed, or a check failed without -allow-incomplete.
func (c *explainConfig) reportFailed(stderr io.Writer, rep *explain.Report) int {
	incomplete := 0
	for _, e := range rep.Explanations {
		if e.Err != nil {
			fmt.Fprintf(stderr, "apportion explain: sample %d: %v\n", e.Index, e.Err)
			continue
		}
		if cp := e.Result.Completeness; cp != nil && cp.Judged && !cp.OK {
			incomplete++
			fmt.Fprintf(stderr, "apportion explain: sample %d: the completeness check failed: the attributions sum to %s, %s off f(x) − f(x′) = %s, a relative gap of %s above the tolerance %s\n",
				e.Index, render.Number(cp.Sum), render.Number(math.Abs(cp.Gap)), render.Number(cp.Expected), render.Number(cp.RelativeGap), render.Number(cp.Tolerance))
		}
	}
	status := exitOK
	if n := rep.Failed(); n > 0 {
		fmt.Fprintf(stderr, "apportion explain: %d of %s failed\n", n, render.Count(len(rep.Explanations), "sample", "samples"))
		status = exitFail
	}
	if incomplete > 0 {
		hint := "more -steps, another -rule, or -allow-incomplete to accept the results"
		if rep.Settings.Method == gradattr.MethodExpectedGradients {
			hint = "more -samples, or -allow-incomplete to accept the results"
		}
		if c.allowIncomplete {
			hint = "accepted with -allow-incomplete"
		} else {
			status = exitFail
		}
		fmt.Fprintf(stderr, "apportion explain: %d of %s incomplete (%s)\n", incomplete, render.Count(len(rep.Explanations)-rep.Failed(), "result", "results"), hint)
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
	case "table", "json", "csv", "npy":
	case "png":
		if c.out == "" {
			return "-format png needs -out, the file to write the image to (PNG is binary, not for a terminal)"
		}
	default:
		return fmt.Sprintf("-format must be table, json, csv, npy or png, got %q", c.format)
	}
	if c.format == "npy" && (c.groups != "" || c.patch != "") && c.out == "" {
		return "-format npy with groups writes two arrays: give -out FILE.npy for the attributions, and the group sums go to FILE_groups.npy"
	}
	if c.patch != "" {
		if c.groups != "" {
			return "-patch and -groups both group the features; give one"
		}
		if _, _, ok := parsePatch(c.patch); !ok {
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

// load reads the model and the samples, compiles the model with parallel
// goroutines per call, and returns the explainer and the samples.
func (c *explainConfig) load(parallel int) (*explain.Explainer, *samples.Batch, error) {
	l, err := loadModel(c.modelPath, c.demo)
	if err != nil {
		return nil, nil, err
	}
	m := l.model
	spec, err := m.Input()
	if err != nil {
		return nil, nil, err
	}
	if _, err := m.Output(c.settings.Output); err != nil {
		return nil, nil, err
	}
	var batch *samples.Batch
	if c.inputPath == "" {
		batch, err = samples.Read(bytes.NewReader(l.demo.Sample), l.demo.SampleFile, spec, m.ReadOptions(true))
	} else {
		batch, err = samples.ReadFile(c.inputPath, spec, m.ReadOptions(true))
	}
	if err != nil {
		return nil, nil, err
	}
	l.noteIgnored(batch.Name, batch.Ignored)
	if err := m.Compile(explain.CompileOptions{InputShapes: explain.OpenShapes(spec, batch), Parallel: parallel}); err != nil {
		return nil, nil, err
	}
	if err := l.readDatasets(&c.settings); err != nil {
		return nil, nil, err
	}
	if c.settings.Method == gradattr.MethodExpectedGradients && c.settings.Reference == nil {
		return nil, nil, &usageErr{fmt.Sprintf("-method %s needs -reference, a file of reference samples", c.settings.Method)}
	}
	head, err := m.Head(c.settings.Output, c.settings.Logits)
	if err != nil {
		return nil, nil, err
	}
	if c.groups != "" {
		size := samples.Product(head.InputShape())
		names := m.Meta.Features
		if len(names) != size {
			names = batch.Features // a CSV header read by position
		}
		f, err := os.Open(c.groups)
		if err != nil {
			return nil, nil, fmt.Errorf("-groups: %w", err)
		}
		c.settings.Groups, err = explain.ReadGroups(f, size, names)
		f.Close()
		if err != nil {
			return nil, nil, fmt.Errorf("-groups %s: %w", c.groups, err)
		}
	}
	if c.patch != "" {
		ph, pw, _ := parsePatch(c.patch)
		shape := head.InputShape()
		if len(shape) < 2 {
			return nil, nil, &usageErr{fmt.Sprintf("-patch %s needs samples with at least two axes (height, width), got shape %s", c.patch, samples.ShapeString(shape))}
		}
		if c.settings.Groups, err = gradattr.GridGroups(shape, ph, pw); err != nil {
			return nil, nil, err
		}
	}
	ex, err := explain.New(m, head, c.settings)
	c.ignored = l.ignored
	return ex, batch, err
}

// parsePatch reads -patch HxW.
func parsePatch(s string) (h, w int, ok bool) {
	hs, ws, found := strings.Cut(strings.ToLower(s), "x")
	h, errH := strconv.Atoi(hs)
	w, errW := strconv.Atoi(ws)
	return h, w, found && errH == nil && errW == nil && h >= 1 && w >= 1
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
