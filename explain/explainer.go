package explain

import (
	"context"
	"encoding/json"
	"fmt"

	"github.com/apportion/apportion/gradattr"
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
	if n := head.OutputSize(); s.Target >= n {
		return nil, fieldError(FieldTarget, fmt.Sprintf(" must be top or an index from 0 to %d (output %q has %d values), got %d", n-1, output, n, s.Target))
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
	if s.Method.Reads(gradattr.ParamBaseline) && s.Baseline.Kind == gradattr.BaselineBlur && len(e.shape) < 2 {
		return nil, fieldError(FieldBaseline, " blur needs samples with at least two axes (height, width), got shape ", samples.ShapeString(e.shape))
	}
	if s.Groups != nil {
		if _, err := gradattr.Cover(e.size, s.Groups); err != nil {
			e := fieldError(FieldGroups, ": ", err)
			e.Input = true
			return nil, e
		}
	}
	return e, nil
}

// options are the method's options for explaining samples of batch (nil
// for single rows): the mean baseline without a reference set averages
// the batch. Baselines name their source by name(dataset).
func (e *Explainer) options(batch *samples.Batch, name func(*Dataset) string) (gradattr.Options, error) {
	s := &e.settings
	o := gradattr.Options{
		Method: s.Method, Points: s.Steps, Rule: s.Rule, Tolerance: s.Tolerance,
		Samples: s.Samples, Noise: s.Noise, Seed: s.Seed, Absolute: s.Absolute, Variant: s.Variant,
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
		rows := batch.Rows()
		for i, row := range rows {
			if err := samples.CheckFinite(row); err != nil {
				e := fieldError(FieldBaseline, fmt.Sprintf(" %s: sample %d of %s: ", b.Kind, i, batch.Name), err)
				e.Input = true
				return o, e
			}
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
	return rec
}

// Attribute explains one row x. A mean baseline needs a reference set
// here.
func (e *Explainer) Attribute(ctx context.Context, x []float64) (*gradattr.Result, error) {
	o, err := e.options(nil, byName)
	if err != nil {
		return nil, err
	}
	return gradattr.Attribute(ctx, e.head, x, e.settings.Target, o)
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
	// Explanations holds one entry per sample, in order.
	Explanations []Explanation

	record map[string]any
}

// Explanation is the result for one sample, or why there is none.
type Explanation struct {
	// Index is the sample's index in the batch.
	Index int
	// Values is the sample.
	Values []float64
	// Result is the attribution; nil when Err is set.
	Result *gradattr.Result
	// BaselineOutputs are the model's outputs at the baseline, when there
	// is one baseline (for gradient × input, the zero input); nil otherwise
	// or when they could not be computed.
	BaselineOutputs []float64
	// Grouped sums the attributions over Settings.Groups.
	Grouped *gradattr.GroupedResult
	// Warnings say what the result's numbers do not: that they are near
	// zero because the output is saturated or does not change.
	Warnings []Warning
	// Err says why the sample could not be explained: it could not be
	// read, holds a NaN or infinity, or the method failed on it.
	Err error
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
	rep := &Report{Model: e.model, Input: e.input.Name, Output: e.output, Settings: e.settings, Options: o, Batch: b,
		record: e.record(o, byName)}
	for i := 0; i < b.Samples; i++ {
		x := b.Sample(i)
		ex := Explanation{Index: i, Values: x}
		switch {
		case b.Bad[i] != nil:
			ex.Err = b.Bad[i]
		case samples.CheckFinite(x) != nil:
			ex.Err = samples.CheckFinite(x)
		default:
			ex.Result, ex.Err = gradattr.Attribute(ctx, e.head, x, e.settings.Target, o)
		}
		if ex.Err == nil {
			if b, ok := reportedBaseline(o); ok {
				ex.BaselineOutputs = e.baselineOutputs(ctx, x, b)
			}
			ex.Warnings = e.warnings(x, ex.Result)
			if e.settings.Groups != nil {
				ex.Grouped, ex.Err = ex.Result.Grouped(e.settings.Groups)
			}
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

// baselineOutputs evaluates the model at the baseline of sample x; nil when
// that fails (the attribution itself has succeeded, so the sample is kept).
func (e *Explainer) baselineOutputs(ctx context.Context, x []float64, b gradattr.Baseline) []float64 {
	var out []float64
	err := guard(func() error {
		xb, err := b.Build(x, e.shape)
		if err != nil {
			return err
		}
		out, err = e.head.Forward(ctx, xb, 1)
		return err
	})
	if err != nil {
		return nil
	}
	return out
}
