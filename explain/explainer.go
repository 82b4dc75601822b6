package explain

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"strings"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// Explainer explains samples of one model output with one set of settings.
// It is safe for concurrent use when its head is.
type Explainer struct {
	model    *Model
	head     gradattr.Model
	settings Settings
	input    samples.Spec
	output   string
	shape    []int // of one sample
	size     int
	// layer is set when the explanation is at an intermediate value
	// (Settings.Layer, and Grad-CAM); attrShape is the shape of the
	// attributions, the input's otherwise.
	layer     *layerState
	attrShape []int
	// tokens is set when the layer is a token model's embedding, whose
	// attributions are summed per token.
	tokens bool
	// held are the model's other runtime inputs (Hold): one batch per
	// input of Model.Inputs, nil at the attributed one.
	held []*samples.Batch
}

// New joins a compiled model, the output explained (head, from
// Model.Head, possibly wrapped) and the settings. It checks the settings
// against the model: the output, the reference set and baseline samples
// (their size), the blur baseline (samples of two axes or more), the
// groups. Setting errors are *FieldError.
func New(m *Model, head gradattr.Model, s Settings) (*Explainer, error) {
	if err := s.Check(); err != nil {
		return nil, err
	}
	input, err := m.Input()
	if err != nil {
		return nil, err
	}
	output, err := m.Output(s.Output)
	if err != nil {
		return nil, err
	}
	e := &Explainer{model: m, head: head, settings: s, input: input, output: output, shape: head.InputShape()}
	e.size = samples.Product(e.shape)
	e.attrShape = e.shape
	if err := e.atLayer(); err != nil {
		return nil, err
	}
	// A model whose output size follows from inputs held per sample (a
	// target shape) has its target checked per sample, by the method.
	if n := head.OutputSize(); n > 0 && s.Target >= n {
		return nil, targetError(s.Target, output, n, "")
	}
	// A method with baselines averages the samples explained when it has
	// no reference set; the others cannot do without one.
	if s.NeedsReference() && !s.Method.Reads(gradattr.ParamBaseline) && s.Reference == nil {
		return nil, fieldError(FieldMethod, " ", s.Method, " needs ", FieldReference, ", a set of reference samples")
	}
	for _, d := range []struct {
		f   Field
		set *Dataset
	}{{FieldReference, s.Reference}, {FieldBaseline, s.Baseline.Samples}} {
		if d.set == nil || (d.f == FieldBaseline && s.Baseline.Kind != gradattr.BaselineValues) {
			continue
		}
		if d.set.Batch == nil {
			return nil, fieldError(d.f, " ", d.set.Name, ": the samples are not read")
		}
		if got := d.set.Batch.SampleSize(); got != e.size {
			e := fieldError(d.f, fmt.Sprintf(" %s: expected samples of %d values, got %d", d.set.Name, e.size, got))
			e.Input = true
			return nil, e
		}
	}
	if s.Method.Reads(gradattr.ParamSteps) && s.Exact == gradattr.ExactAlways {
		pi, ok := head.(gradattr.PathIntegrator)
		if !ok {
			return nil, fieldError(FieldSteps, " ", StepsExact, " needs a model that integrates its gradient along a path")
		}
		if err := pi.PiecewiseLinear(); err != nil {
			return nil, fieldError(FieldSteps, " ", StepsExact, ": ", err)
		}
	}
	if s.Method.Reads(gradattr.ParamBaseline) && s.Baseline.Kind == gradattr.BaselineBlur && len(e.shape) < 2 {
		return nil, fieldError(FieldBaseline, " blur needs samples with at least two axes (height, width), got shape ", samples.ShapeString(e.shape))
	}
	if e.layer != nil && (s.Groups != nil || s.Patch != [2]int{} || s.Superpixels > 0) {
		return nil, fieldError(FieldGroups, " sum features of the input; they do not apply at ", FieldLayer, " ", e.layer.l.Name())
	}
	if err := e.groups(); err != nil {
		return nil, err
	}
	return e, nil
}

// groups checks the settings' groups against the samples, and makes the
// groups of a patch grid.
func (e *Explainer) groups() error {
	s := &e.settings
	for _, f := range []Field{FieldSuperpixels, FieldPatch} {
		if s.given[f] && len(e.shape) < 2 {
			return fieldError(f, " needs samples with at least two axes (height, width), got shape ", samples.ShapeString(e.shape))
		}
	}
	if s.Patch != [2]int{} {
		if s.Groups != nil {
			return fieldError(FieldPatch, " and ", FieldGroups, " both make the groups; give one")
		}
		var err error
		if s.Groups, err = gradattr.GridGroups(e.shape, s.Patch[0], s.Patch[1]); err != nil {
			return fieldError(FieldPatch, ": ", err)
		}
	}
	if s.Superpixels > 0 && s.Groups != nil {
		return fieldError(FieldSuperpixels, " and ", FieldGroups, " both make the groups; give one")
	}
	grouped := s.Groups != nil || s.Superpixels > 0
	if s.given[FieldWindow] && grouped {
		return fieldError(FieldWindow, " moves over the image without groups; with groups each group is occluded in turn")
	}
	if s.Groups == nil {
		return nil
	}
	cov, err := gradattr.Cover(e.size, s.Groups)
	if err == nil && s.Method.Perturbs() && !cov.Partition() {
		err = fmt.Errorf("%s switches groups on and off, so each feature must be in exactly one group; %d features are in none and %d in more than one",
			s.Method, len(cov.Missing), len(cov.Overlapping))
	}
	if err != nil {
		e := fieldError(FieldGroups, ": ", err)
		e.Input = true
		return e
	}
	return nil
}

// options are the method's options for explaining samples of batch (nil
// for single rows): the mean baseline without a reference set averages
// the batch. Baselines name their source by name(dataset).
func (e *Explainer) options(batch *samples.Batch, name func(*Dataset) string) (gradattr.Options, error) {
	s := &e.settings
	o := gradattr.Options{
		Method: s.Method, Points: s.Steps, Rule: s.Rule, Tolerance: s.Tolerance, Exact: s.Exact,
		Samples: s.Samples, Noise: s.Noise, Seed: s.Seed, Absolute: s.Absolute, Variant: s.Variant,
		ReferenceRows: s.ReferenceRows, Estimator: s.Estimator, Coalitions: s.Coalitions,
		KernelWidth: s.KernelWidth, Window: s.Window, Stride: s.Stride,
		Groups: s.Groups, Superpixels: s.Superpixels, Compactness: s.Compactness,
	}
	if s.Reference != nil && s.Reference.Batch != nil {
		o.Reference = s.Reference.Batch.Rows()
	}
	if !s.Method.Reads(gradattr.ParamBaseline) {
		return o, nil
	}
	switch b := s.Baseline; b.Kind {
	case gradattr.BaselineMean, gradattr.BaselineMedian:
		if o.Reference != nil {
			o.Baselines = []gradattr.Baseline{{Kind: b.Kind, Reference: o.Reference}}
			break
		}
		if batch == nil {
			return o, fieldError(FieldBaseline, " ", string(b.Kind), " needs ", FieldReference, " to explain single rows")
		}
		// The samples that could not be read are no part of the mean: each
		// gets its own error, the others are explained.
		var rows [][]float64
		for i, row := range batch.Rows() {
			if batch.Bad[i] != nil {
				continue
			}
			rows = append(rows, row)
			if err := samples.CheckFinite(row); err != nil {
				e := fieldError(FieldBaseline, fmt.Sprintf(" %s: sample %d of %s: ", b.Kind, i, batch.Name), err)
				e.Input = true
				return o, e
			}
		}
		if len(rows) == 0 {
			e := fieldError(FieldBaseline, fmt.Sprintf(" %s: no sample of %s could be read: ", b.Kind, batch.Name), batch.FirstBad())
			e.Input = true
			return o, e
		}
		o.Baselines = []gradattr.Baseline{{Kind: b.Kind, Reference: rows, Source: batch.Name}}
	case gradattr.BaselineConstant:
		o.Baselines = []gradattr.Baseline{{Kind: gradattr.BaselineConstant, Value: b.Value}}
	case gradattr.BaselineUniform:
		o.Baselines = []gradattr.Baseline{{Kind: gradattr.BaselineUniform, Lo: b.Lo, Hi: b.Hi, Seed: s.Seed}}
	case gradattr.BaselineBlur:
		o.Baselines = []gradattr.Baseline{{Kind: gradattr.BaselineBlur, Sigma: b.Sigma}}
	case gradattr.BaselineValues:
		for _, row := range b.Samples.Batch.Rows() {
			o.Baselines = append(o.Baselines, gradattr.Baseline{Kind: gradattr.BaselineValues, Values: row, Source: name(b.Samples)})
		}
	default:
		o.Baselines = []gradattr.Baseline{{Kind: gradattr.BaselineZero}}
	}
	return o, nil
}

func byName(d *Dataset) string   { return d.Name }
func byDigest(d *Dataset) string { return d.Digest }

// record is the settings of o in one representation: the library's
// record of the method's options (gradattr.Options.Settings, defaults
// filled in), then what selects the explained value (target, logits,
// output) and the reference set, named by name.
func (e *Explainer) record(o gradattr.Options, name func(*Dataset) string) map[string]any {
	rec := map[string]any{}
	if raw, err := json.Marshal(o.Settings()); err == nil {
		_ = json.Unmarshal(raw, &rec) // a Settings value marshals to an object
	}
	delete(rec, "method") // a key of the documents themselves
	s := &e.settings
	rec["target"], rec["logits"], rec["output"] = DefaultTargetText, s.Logits, e.output
	if s.Target >= 0 {
		rec["target"] = s.Target
	}
	if s.Reference != nil && s.NeedsReference() {
		rec["reference"] = name(s.Reference)
	}
	switch {
	case e.tokens:
		rec["layer"] = e.layer.l.Name()
		if s.Method.Reads(gradattr.ParamBaseline) && s.BaselineToken != nil {
			rec["baseline_token"] = *s.BaselineToken
		}
	case e.layer != nil:
		rec["layer"] = e.layer.l.Name()
		if s.Method.Reads(gradattr.ParamBaseline) {
			rec["layer_baseline"] = s.layerBaseline()
		}
	}
	if s.Patch != [2]int{} {
		rec["patch"] = fmt.Sprintf("%dx%d", s.Patch[0], s.Patch[1])
	}
	return rec
}

// Hold gives the values of the model's other runtime inputs: one batch per
// input of Model.Inputs, in order, nil at the input explanations attribute
// to. Each batch holds as many samples as the batch Explain gets, or one
// sample, which every sample then shares: sample i is explained with the
// other inputs at their sample i, held fixed while the method varies the
// attributed input. A compile-time input (a parameter such as a target
// shape, Model.CompileTimeInput) is its batch whole, as a file gives it.
func (e *Explainer) Hold(inputs []*samples.Batch) error {
	feeds := e.model.Inputs()
	if len(inputs) != len(feeds) {
		return fmt.Errorf("expected one input per model input (%d: %s), got %d", len(feeds), inputNames(feeds), len(inputs))
	}
	for i, b := range inputs {
		if feeds[i].Name != e.input.Name && b == nil {
			return fmt.Errorf("input %q: no samples given", feeds[i].Name)
		}
	}
	e.held = inputs
	return nil
}

func inputNames(vis []*onnxlite.ValueInfo) string {
	names := make([]string, len(vis))
	for i, v := range vis {
		names[i] = v.Name
	}
	return strings.Join(names, ", ")
}

// headFor returns the head that explains sample i: e's, with the other
// inputs held at their sample i.
func (e *Explainer) headFor(i int) (gradattr.Model, error) {
	if len(e.model.Inputs()) == 1 {
		return e.head, nil
	}
	if e.held == nil {
		return nil, fmt.Errorf("the model has %d inputs (%s): give samples for each", len(e.model.Inputs()), inputNames(e.model.Inputs()))
	}
	w, ok := e.head.(interface {
		With([]*onnxlite.Tensor) (*nn.Head, error)
	})
	if !ok {
		return nil, fmt.Errorf("the head explained cannot hold the model's other inputs")
	}
	feeds := e.model.Inputs()
	ts := make([]*onnxlite.Tensor, len(feeds))
	for k, b := range e.held {
		if b == nil || feeds[k].Name == e.input.Name {
			continue
		}
		if e.model.CompileTimeInput(feeds[k].Name) {
			// A parameter of the graph (a target shape): the whole file,
			// the same for every sample.
			t, err := b.ToTensor(samples.SpecOf(feeds[k]))
			if err != nil {
				return nil, fmt.Errorf("input %q: %w", feeds[k].Name, err)
			}
			ts[k] = t
			continue
		}
		j := i
		if b.Samples == 1 {
			j = 0
		}
		if j >= b.Samples {
			return nil, fmt.Errorf("input %q: %d samples, no sample %d", feeds[k].Name, b.Samples, i)
		}
		if b.Bad[j] != nil {
			return nil, fmt.Errorf("input %q: %w", feeds[k].Name, b.Bad[j])
		}
		t, err := b.SampleTensor(j, samples.SpecOf(feeds[k]))
		if err != nil {
			return nil, fmt.Errorf("input %q: %w", feeds[k].Name, err)
		}
		ts[k] = t
	}
	var h gradattr.Model
	err := guard(func() (err error) {
		h, err = w.With(ts)
		return err
	})
	return h, err
}

// targetError is the error of a target beyond output's n values (where,
// when not "", says under which inputs it has them).
func targetError(target int, output string, n int, where string) *FieldError {
	return fieldError(FieldTarget, fmt.Sprintf(" must be top or an index from 0 to %d (output %q has %d values%s), got %d", n-1, output, n, where, target))
}

// Attribute explains one row x. A mean baseline needs a reference set
// here.
func (e *Explainer) Attribute(ctx context.Context, x []float64) (*gradattr.Result, error) {
	o, err := e.options(nil, byName)
	if err != nil {
		return nil, err
	}
	res, _, _, err := e.attribute(ctx, e.head, x, o)
	return res, err
}

// Work is the most samples explaining b sends through the model: per
// sample, the method's estimate (gradattr.Options.Estimate) and the model's output
// at the baseline a result reports (see reportedBaseline); b.Samples times that, saturated at math.MaxInt. It
// is known before any model call.
func (e *Explainer) Work(b *samples.Batch) (int, error) {
	o, err := e.options(b, byName)
	if err != nil {
		return 0, err
	}
	est, err := o.Estimate(e.head.InputShape())
	if err != nil {
		return 0, err
	}
	per := est.GradientEvals + est.ForwardPasses
	if _, ok := reportedBaseline(o); ok {
		per++
	}
	if b.Samples > 0 && per > math.MaxInt/b.Samples {
		return math.MaxInt, nil
	}
	return per * b.Samples, nil
}

// Report is the explanations of a batch of samples, with what they are of.
type Report struct {
	// Model is the model explained; Input names its input, Output the
	// output explained.
	Model  *Model
	Input  string
	Output string
	// Settings are the settings; Options the method's options they came
	// to for this batch.
	Settings Settings
	Options  gradattr.Options
	// Batch is the samples explained.
	Batch *samples.Batch
	// Layer names the value the attributions are of, "" for the input;
	// Shape is their per-sample shape.
	Layer string
	Shape []int
	// Tokens is set when the attributions are per token of a model of
	// token ids (see Model.Tokens): one per position of the sample.
	Tokens bool

	layerShape []int
	// Explanations holds one entry per sample, in order.
	Explanations []Explanation

	record map[string]any
}

// Explanation is the result for one sample, or why there is none.
type Explanation struct {
	// Index is the sample's index in its file: in the batch, plus the
	// batch's First.
	Index int
	// Values is the sample.
	Values []float64
	// Tokens names the sample's tokens, one per position, when the report
	// is per token (Report.Tokens).
	Tokens []string
	// LayerValues is the value at Settings.Layer for the sample, V(x),
	// when the explanation is at a layer (for Grad-CAM, the activation A);
	// nil otherwise.
	LayerValues []float64
	// Result is the attribution; nil when Err is set.
	Result *gradattr.Result
	// BaselineOutputs are the model's outputs at the baseline: the
	// method's own (gradattr.Result.BaselineOutputs) when it has them,
	// else those at the one baseline (for gradient × input, the zero
	// input); nil when there are several or they could not be computed.
	BaselineOutputs []float64
	// Grouped is the attributions per group of Settings.Groups or of the
	// superpixels (gradattr.Result.Groups).
	Grouped *gradattr.GroupedResult
	// Warnings say what the result's numbers do not: that they are near
	// zero because the output is saturated or does not change.
	Warnings []Warning
	// Err says why the sample could not be explained: it could not be
	// read, holds a NaN or infinity, or the method failed on it.
	Err error
}

// FeatureValues returns the values e's attributions are of, one per
// attribution: the sample, or its value at the layer; nil for Grad-CAM,
// whose map has one entry per place of the layer, not per value.
func (r *Report) FeatureValues(e Explanation) []float64 {
	switch {
	case r.Layer == "" || r.Tokens:
		return e.Values
	case r.Settings.Method == gradattr.MethodGradCAM:
		return nil
	}
	return e.LayerValues
}

// SampleLabels names the features of explanation e: one per token, "i
// token", for a report per token; Labels otherwise.
func (r *Report) SampleLabels(e Explanation) []string {
	if !r.Tokens {
		return r.Labels()
	}
	out := make([]string, len(e.Tokens))
	for i, t := range e.Tokens {
		out[i] = fmt.Sprintf("%d %s", i, t)
	}
	return out
}

// LayerShape returns the per-sample shape of the value at Layer; nil
// without a layer.
func (r *Report) LayerShape() []int {
	if r.Layer == "" {
		return nil
	}
	return r.layerShape
}

// Failed returns the number of samples that could not be explained.
func (r *Report) Failed() int {
	n := 0
	for _, x := range r.Explanations {
		if x.Err != nil {
			n++
		}
	}
	return n
}

// Labels names the features of one sample (see modelmeta.Meta.Labels):
// by the model's names, else by the batch's CSV header, else by index.
func (r *Report) Labels() []string {
	meta := r.Model.Meta
	if r.Layer != "" {
		meta.Features = nil
		return meta.Labels(r.Shape)
	}
	if meta.Features == nil {
		meta.Features = r.Batch.Features
	}
	return meta.Labels(r.Batch.SampleShape())
}

// Explain explains every sample of b, calling progress (which may be nil)
// after each. A sample that cannot be read or explained gets its error and
// the others go on; the error returned is one that stops the batch: a
// setting that does not fit it.
func (e *Explainer) Explain(ctx context.Context, b *samples.Batch, progress func(done, total int)) (*Report, error) {
	if got := b.SampleSize(); got != e.size {
		return nil, fmt.Errorf("input %s: expected samples of shape %s (%d values), got %s (%d values)",
			b.Name, samples.ShapeString(e.shape), e.size, samples.ShapeString(b.SampleShape()), got)
	}
	o, err := e.options(b, byName)
	if err != nil {
		return nil, err
	}
	for k, h := range e.held {
		if h != nil && h.Samples != 1 && h.Samples != b.Samples && !e.model.CompileTimeInput(e.model.Inputs()[k].Name) {
			return nil, fmt.Errorf("input %q: %d samples, expected one or as many as the %d of %s", e.model.Inputs()[k].Name, h.Samples, b.Samples, b.Name)
		}
	}
	rep := &Report{Model: e.model, Input: e.input.Name, Output: e.output, Settings: e.settings, Options: o, Batch: b,
		Shape: e.attrShape, record: e.record(o, byName)}
	if e.layer != nil {
		rep.Layer, rep.layerShape = e.layer.l.Name(), e.layer.l.InputShape()
	}
	rep.Tokens = e.perToken()
	for i := 0; i < b.Samples; i++ {
		x := b.Sample(i)
		ex := Explanation{Index: b.First + i, Values: x}
		head, err := e.headFor(b.First + i)
		switch {
		case b.Bad[i] != nil:
			ex.Err = b.Bad[i]
		case samples.CheckFinite(x) != nil:
			ex.Err = samples.CheckFinite(x)
		case err != nil:
			ex.Err = err
		case e.settings.Target >= head.OutputSize() && head.OutputSize() > 0:
			// Known only now that the sample's other inputs are held.
			n := head.OutputSize()
			ex.Err = targetError(e.settings.Target, e.output, n, " with this sample's inputs")
		default:
			var at []float64
			ex.Result, at, ex.BaselineOutputs, ex.Err = e.attribute(ctx, head, x, o)
			ex.Err = UserError(ex.Err)
			if ex.Err == nil {
				ex.Warnings = e.warnings(at, ex.Result)
			}
			if e.layer != nil && !e.tokens {
				ex.LayerValues = at
			}
			if rep.Tokens {
				ex.Tokens = e.model.TokenNames(x)
			}
		}
		if ex.Err == nil {
			ex.Grouped = ex.Result.Groups
		}
		rep.Explanations = append(rep.Explanations, ex)
		if progress != nil {
			progress(i+1, b.Samples)
		}
	}
	return rep, nil
}

// reportedBaseline is the one baseline whose outputs a result reports: the
// baseline of integrated gradients when there is one, the zero input that
// gradient × input's completeness is checked against.
func reportedBaseline(o gradattr.Options) (gradattr.Baseline, bool) {
	switch {
	case o.Method == gradattr.MethodGradientTimesInput:
		return gradattr.Baseline{Kind: gradattr.BaselineZero}, true
	case o.Method.Reads(gradattr.ParamBaseline) && len(o.Baselines) == 1:
		return o.Baselines[0], true
	}
	return gradattr.Baseline{}, false
}
