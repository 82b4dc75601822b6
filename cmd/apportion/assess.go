package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"runtime"
	"slices"
	"strconv"
	"strings"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/fidelity"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/render"
	"github.com/apportion/apportion/samples"
)

// assessConfig holds assess's flags.
type assessConfig struct {
	modelPath, inputPath, reference, demo string
	methods, metrics, format, out         string
	output, target, baseline, groups      string
	patch, class                          string
	logits                                bool
	limit                                 int
	seed                                  uint64
	config                                fidelity.Config
}

func runAssess(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("assess", "[-model PATH -input PATH | -demo NAME] [flags]",
		"apportion assess -model model.onnx -input held_out.csv -reference train.csv -methods ig,grad -format table\n"+
			"\tapportion assess -demo welds -format png -out welds_assess.png",
		"Scores attribution methods on a model and samples: deletion and insertion\n"+
			"areas beside those of random orders (Petsiuk et al. 2018), infidelity under\n"+
			"Gaussian and baseline perturbations and max-sensitivity (Yeh et al. 2019),\n"+
			"the model-parameter randomization test (Adebayo et al. 2018) and the share\n"+
			"of completeness checks passed; each as a mean across samples with its 95%\n"+
			"interval. Samples that cannot be read or scored are reported and skipped.\n\n"+
			"Without -model, assess runs an embedded, invented demo (-demo pumps or welds)\n"+
			"on the first -limit samples of its held-out test set, with its reference set;\n"+
			"welds is scored by 4x4 patches. The scores describe the methods on this\n"+
			"model and these samples, not in general.\n\n"+caution, stderr)
	var c assessConfig
	var names []string
	for _, m := range fidelity.Scorable() {
		names = append(names, m.Alias())
	}
	var metricNames []string
	for _, m := range fidelity.Metrics() {
		metricNames = append(metricNames, string(m))
	}
	fs.StringVar(&c.modelPath, "model", "", "ONNX model `file` (default: the embedded demo model chosen by -demo)")
	fs.StringVar(&c.inputPath, "input", "", "samples to score on: a .csv, .json, .npy or .pb `file` (required with -model; default: the demo's test set)")
	fs.StringVar(&c.reference, "reference", "", "reference samples `file`: for the methods that read one (expected-grad), and the scale of the perturbations (default without -model: the demo's reference set)")
	fs.StringVar(&c.demo, "demo", "", "embedded invented demo `scenario` to assess without -model: pumps (the default) or welds")
	fs.StringVar(&c.methods, "methods", "", "comma-separated `list` of methods to score (default all: "+strings.Join(names, ",")+")")
	fs.StringVar(&c.metrics, "metrics", "", "comma-separated `list` of metrics (default all: "+strings.Join(metricNames, ",")+")")
	fs.StringVar(&c.format, "format", "table", "output format: table, json or png (png needs -out)")
	fs.StringVar(&c.out, "out", "", "write the result to `file` instead of standard output")
	fs.StringVar(&c.output, "output", "", "`name` of the model output to explain (default the first)")
	fs.StringVar(&c.target, "target", explain.DefaultTargetText, "output element to explain: an index `N`, or top for each sample's largest")
	fs.BoolVar(&c.logits, "logits", false, "explain the input of the Softmax, LogSoftmax or Sigmoid that produces the output (the logits)")
	fs.StringVar(&c.baseline, "baseline", "", "what removed features are replaced by, and the baseline of the methods that read one: zero, constant:V, or mean or median of the reference set (default zero; for the demos, mean)")
	fs.StringVar(&c.groups, "groups", "", "JSON `file` of feature groups removed and perturbed whole: {\"name\": [features], ...}")
	fs.StringVar(&c.patch, "patch", "", "remove and perturb image samples by patches of `HxW` pixels (default for the welds demo: 4x4)")
	fs.StringVar(&c.class, "class", "", "score only the samples the model classes `C` (its largest output): a class name or index (default all; for the demos, failing pumps and defective welds)")
	fs.IntVar(&c.limit, "limit", 20, "score the first `N` samples of -input, after -class (0: all)")
	fs.IntVar(&c.config.Steps, "curve-steps", 0, "steps of the deletion and insertion curves `N` (default one per feature or group)")
	fs.IntVar(&c.config.RandomOrders, "orders", fidelity.DefaultRandomOrders, "random orders `N` per sample that deletion and insertion are compared with")
	fs.IntVar(&c.config.Draws, "draws", fidelity.DefaultDraws, "perturbations `N` per sample of infidelity")
	fs.IntVar(&c.config.SensitivityDraws, "sensitivity-draws", fidelity.DefaultSensitivityDraws, "points `N` per sample of max-sensitivity")
	fs.Float64Var(&c.config.Noise, "perturb-noise", fidelity.DefaultNoise, "σ of infidelity's Gaussian perturbations, in standard deviations `R` of each feature (of all values for images)")
	fs.Float64Var(&c.config.Radius, "radius", fidelity.DefaultRadius, "max-sensitivity's radius, in standard deviations `R`")
	fs.Int64Var(&c.config.Budget, "budget", fidelity.DefaultBudget, "largest cost `N` of one attribution, in input values evaluated, for which max-sensitivity and randomization repeat it (-1: no bound)")
	fs.Uint64Var(&c.seed, "seed", gradattr.DefaultSeed, "seed of every random draw: the methods', the orders', the perturbations', the randomized weights'")
	if code, done := parseFlags(fs, args, stdout); done {
		return code
	}
	if msg := c.validate(); msg != "" {
		return usageError(stderr, "assess", "%s", msg)
	}
	title, err := c.load(stderr)
	if err != nil {
		return fail(stderr, "assess", err)
	}
	c.config.Progress = assessProgress(stderr)
	rep, err := fidelity.Assess(context.Background(), c.config)
	if err != nil {
		return failure(stderr, "assess", err)
	}
	var buf bytes.Buffer
	switch c.format {
	case "json":
		enc := json.NewEncoder(&buf)
		enc.SetIndent("", "  ")
		err = enc.Encode(rep)
	case "png":
		err = render.AssessPNG(&buf, rep, title)
	default:
		err = render.AssessTable(&buf, rep, title)
	}
	if err != nil {
		return failure(stderr, "assess", err)
	}
	if c.out != "" {
		err = os.WriteFile(c.out, buf.Bytes(), 0o644)
	} else {
		_, err = stdout.Write(buf.Bytes())
	}
	if err != nil {
		return failure(stderr, "assess", err)
	}
	for _, s := range rep.Methods {
		if s.NotScored != "" {
			fmt.Fprintf(stderr, "apportion assess: %s not scored: %s; give -reference\n", s.Title, s.NotScored)
		}
	}
	for _, s := range rep.Skipped {
		fmt.Fprintf(stderr, "apportion assess: sample %d skipped: %s\n", s.Index, s.Error)
	}
	if rep.Samples == 0 {
		fmt.Fprintf(stderr, "apportion assess: no sample could be scored\n")
		return exitFail
	}
	return exitOK
}

// validate checks the flags that need no file; it returns a message for a
// usage error, or "".
func (c *assessConfig) validate() string {
	switch c.format {
	case "table", "json":
	case "png":
		if c.out == "" {
			return "-format png needs -out, the file to write the image to"
		}
	default:
		return fmt.Sprintf("-format must be table, json or png, got %q", c.format)
	}
	if c.demo != "" && c.modelPath != "" {
		return "-demo selects an embedded model and samples; it cannot be combined with -model"
	}
	if c.modelPath != "" && c.inputPath == "" {
		return "-input is required with -model"
	}
	if c.limit < 0 {
		return fmt.Sprintf("-limit must be 0 (all samples) or more, got %d", c.limit)
	}
	if c.patch != "" && c.groups != "" {
		return "-patch and -groups both group the features; give one"
	}
	if c.patch != "" {
		var s explain.Settings
		if s.Set(explain.FieldPatch, c.patch) != nil {
			return fmt.Sprintf("-patch must be HxW, two whole numbers of pixels such as 4x4, got %q", c.patch)
		}
	}
	if c.config.Steps < 0 {
		return fmt.Sprintf("-curve-steps must be 0 (one per feature or group) or more, got %d", c.config.Steps)
	}
	for _, f := range []struct {
		name string
		v    int
	}{{"-orders", c.config.RandomOrders}, {"-draws", c.config.Draws}, {"-sensitivity-draws", c.config.SensitivityDraws}} {
		if f.v < 1 {
			return fmt.Sprintf("%s must be at least 1, got %d", f.name, f.v)
		}
	}
	if !(c.config.Noise > 0) || !(c.config.Radius > 0) {
		return "-perturb-noise and -radius must be positive numbers"
	}
	if c.metrics != "" {
		var err error
		if c.config.Metrics, err = fidelity.ParseMetrics(c.metrics); err != nil {
			return "-metrics: " + strings.TrimPrefix(err.Error(), fidelity.ErrOptions.Error()+": ")
		}
	}
	return ""
}

// load reads the model, the samples, the reference set and the groups into
// c.config, and returns the report's title.
func (c *assessConfig) load(stderr io.Writer) (string, error) {
	l, err := loadModel(c.modelPath, c.demo)
	if err != nil {
		return "", err
	}
	m := l.model
	spec, err := m.Input()
	if err != nil {
		return "", err
	}
	var batch *samples.Batch
	switch {
	case c.inputPath != "":
		batch, err = samples.ReadFile(c.inputPath, spec, m.ReadOptions(true))
	default:
		name := l.demo.Test[0]
		raw, ferr := demo.File(name)
		if ferr != nil {
			return "", ferr
		}
		batch, err = samples.Read(bytes.NewReader(raw), "demo:"+name, spec, m.ReadOptions(true))
	}
	if err != nil {
		return "", err
	}
	l.noteIgnored(batch.Name, batch.Ignored)
	parallel := runtime.GOMAXPROCS(0)
	compile := explain.CompileOptions{InputShapes: explain.OpenShapes(spec, batch), Parallel: parallel}
	if err := m.Compile(compile); err != nil {
		return "", err
	}
	head, err := m.Head(c.output, c.logits)
	if err != nil {
		return "", err
	}
	shape := head.InputShape()
	size := samples.Product(shape)
	if got := batch.SampleSize(); got != size {
		return "", fmt.Errorf("input %s: expected samples of shape %s (%d values), got %s (%d values)",
			batch.Name, samples.ShapeString(shape), size, samples.ShapeString(batch.SampleShape()), got)
	}
	class := c.class
	if class == "" && c.modelPath == "" && c.inputPath == "" {
		class = l.demo.SampleClass
	}
	want, err := classIndex(class, m.Meta.Classes, head.OutputSize())
	if err != nil {
		return "", err
	}
	cfg := &c.config
	cfg.Model, cfg.Seed = head, c.seed
	for i := 0; i < batch.Samples && (c.limit == 0 || len(cfg.Samples) < c.limit); i++ {
		if want >= 0 && batch.Bad[i] == nil && samples.CheckFinite(batch.Sample(i)) == nil {
			out, err := head.Forward(context.Background(), batch.Sample(i), 1)
			if err != nil {
				return "", fmt.Errorf("running the model on sample %d: %w", i, err)
			}
			if gradattr.Top(out) != want {
				continue
			}
		}
		cfg.Samples = append(cfg.Samples, batch.Sample(i))
		cfg.Bad = append(cfg.Bad, batch.Bad[i])
	}
	ref, err := l.reference(c.reference)
	if err != nil {
		return "", err
	}
	if ref != nil {
		cfg.Reference = ref.Batch.Rows()
	}
	var s explain.Settings
	if err := s.Set(explain.FieldTarget, c.target); err != nil {
		return "", err
	}
	cfg.Target = s.Target
	if cfg.Baseline, err = c.readBaseline(cfg.Reference, shape); err != nil {
		return "", err
	}
	patch := c.patch
	if patch == "" && c.groups == "" && c.modelPath == "" && len(shape) >= 2 {
		patch = "4x4"
	}
	switch {
	case c.groups != "":
		names := m.Meta.Features
		if len(names) != size {
			names = batch.Features
		}
		f, err := os.Open(c.groups)
		if err != nil {
			return "", fmt.Errorf("-groups: %w", err)
		}
		cfg.Groups, err = explain.ReadGroups(f, size, names)
		f.Close()
		if err != nil {
			return "", fmt.Errorf("-groups %s: %w", c.groups, err)
		}
	case patch != "":
		if err := s.Set(explain.FieldPatch, patch); err != nil {
			return "", err
		}
		ph, pw := s.Patch[0], s.Patch[1]
		if len(shape) < 2 {
			return "", &usageErr{fmt.Sprintf("-patch %s needs samples with at least two axes (height, width), got shape %s", patch, samples.ShapeString(shape))}
		}
		if cfg.Groups, err = gradattr.GridGroups(shape, ph, pw); err != nil {
			return "", err
		}
	}
	if c.methods != "" {
		for _, name := range strings.Split(c.methods, ",") {
			meth, err := gradattr.ParseMethod(strings.TrimSpace(name))
			if err != nil {
				return "", &usageErr{fmt.Sprintf("-methods: %q is not a method; want some of %s", name, gradattr.MethodNames())}
			}
			if !slices.Contains(fidelity.Scorable(), meth) {
				return "", &usageErr{fmt.Sprintf("-methods: %s maps a layer's positions, not the input's features, which assess removes and perturbs in the order of their attributions", name)}
			}
			cfg.Methods = append(cfg.Methods, meth)
		}
	}
	cfg.Layers = m.Layers()
	compile.Parallel = 1
	cfg.Randomized = m.Cascade(c.output, c.logits, c.seed, compile)
	notes(stderr, "assess", l.ignored)
	what := fmt.Sprintf("%s on %s", m.Name, batch.Name)
	if class != "" {
		what += ", the samples classed " + class
	}
	if len(cfg.Groups) > 0 {
		what += ", by " + render.Count(len(cfg.Groups), "group", "groups")
	}
	return what, nil
}

// classIndex returns the output index class names, by name or index; -1
// for "".
func classIndex(class string, names []string, n int) (int, error) {
	if class == "" {
		return -1, nil
	}
	for i, name := range names {
		if name == class {
			return i, nil
		}
	}
	if i, err := strconv.Atoi(class); err == nil && i >= 0 && i < n {
		return i, nil
	}
	if len(names) > 0 {
		return 0, &usageErr{fmt.Sprintf("-class must be one of %s or an index from 0 to %d, got %q", strings.Join(names, ", "), n-1, class)}
	}
	return 0, &usageErr{fmt.Sprintf("-class must be an index from 0 to %d, got %q", n-1, class)}
}

// readBaseline returns the baseline -baseline names; nil for zero.
func (c *assessConfig) readBaseline(ref [][]float64, shape []int) ([]float64, error) {
	text := c.baseline
	if text == "" {
		text = explain.DefaultBaselineText
		if c.modelPath == "" {
			// The demos' reference sets are normal pumps and clean welds:
			// removing a feature makes it ordinary, not zero (a zero
			// sensor reading, a black patch).
			text = "mean"
		}
	}
	b, err := explain.ParseBaseline(text)
	if err != nil {
		return nil, err
	}
	switch b.Kind {
	case gradattr.BaselineZero:
		return nil, nil
	case gradattr.BaselineConstant:
		return gradattr.Baseline{Kind: b.Kind, Value: b.Value}.Build(make([]float64, samples.Product(shape)), shape)
	case gradattr.BaselineMean, gradattr.BaselineMedian:
		if ref == nil {
			return nil, &usageErr{fmt.Sprintf("-baseline %s needs -reference, a file of reference samples", text)}
		}
		return gradattr.Baseline{Kind: b.Kind, Reference: ref}.Build(ref[0], shape)
	}
	return nil, &usageErr{fmt.Sprintf("-baseline must be zero, constant:V, mean or median, got %q", text)}
}

// assessProgress reports scored samples on w when w is a terminal.
func assessProgress(w io.Writer) func(done, total int) {
	if progress(w) == nil {
		return nil
	}
	return func(done, total int) {
		fmt.Fprintf(w, "\rassessed %d of %d samples", done, total)
		if done == total {
			fmt.Fprint(w, "\r\033[K")
		}
	}
}
