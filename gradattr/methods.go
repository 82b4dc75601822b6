package gradattr

import (
	"context"
	"fmt"
	"slices"
	"strings"
)

// Method names an attribution method. Its value is the canonical name that
// results, summaries and documents record; ParseMethod also accepts each
// method's short alias, the name the command line has long used.
type Method string

// The methods, by canonical name.
const (
	MethodGradient            Method = "gradient"
	MethodGradientTimesInput  Method = "gradient-times-input"
	MethodSmoothGrad          Method = "smoothgrad"
	MethodIntegratedGradients Method = "integrated-gradients"
	MethodExpectedGradients   Method = "expected-gradients"
)

// Param names a setting that some methods read, as the command line's
// flags and the HTTP API's fields spell it.
type Param string

// The parameters, with the field of Options each one sets.
const (
	ParamBaseline  Param = "baseline"  // Options.Baselines
	ParamReference Param = "reference" // Options.Reference
	ParamSteps     Param = "steps"     // Options.Points
	ParamRule      Param = "rule"      // Options.Rule
	ParamTolerance Param = "tolerance" // Options.Tolerance
	ParamSamples   Param = "samples"   // Options.Samples
	ParamNoise     Param = "noise"     // Options.Noise
	ParamSeed      Param = "seed"      // Options.Seed
	ParamAbs       Param = "abs"       // Options.Absolute
	ParamVariant   Param = "variant"   // Options.Variant
)

// DefaultSeed is the seed Method.Defaults gives the random methods. An
// Options value takes its Seed as it is: its zero value is seed 0.
const DefaultSeed = 1

// Options selects a method and sets its parameters, one struct for every
// method, so that a surface (command-line flags, an HTTP request, a
// pipeline step) can carry any of them. Attribute runs the method.
//
// A zero Tolerance, Samples or Noise takes the value of Method.Defaults;
// a zero Points refines the point count automatically, the zero Rule is
// the trapezoid rule and nil Baselines is one zero baseline. Seed is taken
// as it is. Fields the method does not read (see Method.Params) are
// ignored.
type Options struct {
	// Method is the method to run.
	Method Method
	// Points fixes the number of integration points of integrated
	// gradients per baseline; 0 chooses it automatically (IGOptions.Points).
	Points int
	// Rule is the quadrature rule of integrated gradients.
	Rule Rule
	// Tolerance is the relative completeness gap to meet (integrated
	// gradients) or to judge by (expected gradients).
	Tolerance float64
	// Samples is the number of noisy copies of SmoothGrad or of draws of
	// expected gradients.
	Samples int
	// Noise is SmoothGrad's noise level σ/(max x − min x).
	Noise float64
	// Seed seeds the random methods.
	Seed uint64
	// Absolute takes the gradient's absolute value (GradientOptions).
	Absolute bool
	// Variant is SmoothGrad's aggregate; the zero value is the mean.
	Variant Variant
	// Baselines are the baselines of integrated gradients.
	Baselines []Baseline
	// Reference is the reference set: expected gradients draw their
	// baselines from it, and a BaselineMean or BaselineMedian baseline of
	// integrated gradients without a Reference of its own averages it.
	Reference [][]float64
	// BatchSize is the number of points per model call; 0 means
	// DefaultBatchSize.
	BatchSize int
}

// methodSpec declares one method: its names, the parameters it reads, the
// defaults of those parameters and how Attribute runs it. Adding a method
// is adding one entry to methodSpecs.
type methodSpec struct {
	method   Method
	alias    string // the command line's short name; "" when there is none
	title    string // the name in running text and figure titles
	params   []Param
	defaults Options
	run      func(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error)
}

var methodSpecs = []methodSpec{
	{
		method: MethodGradient, alias: "grad", title: "gradient",
		params: []Param{ParamAbs},
		run: func(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error) {
			return Gradient(ctx, m, x, target, GradientOptions{Absolute: o.Absolute})
		},
	},
	{
		method: MethodGradientTimesInput, alias: "grad-input", title: "gradient × input",
		run: func(ctx context.Context, m Model, x []float64, target int, _ Options) (*Result, error) {
			return GradientTimesInput(ctx, m, x, target)
		},
	},
	{
		method: MethodSmoothGrad, title: "SmoothGrad",
		params:   []Param{ParamSamples, ParamNoise, ParamSeed, ParamVariant},
		defaults: Options{Samples: DefaultSamples, Noise: DefaultNoise, Seed: DefaultSeed},
		run: func(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error) {
			return SmoothGrad(ctx, m, x, target, SmoothGradOptions{
				Samples: o.Samples, Noise: o.Noise, Seed: o.Seed, Variant: o.Variant, BatchSize: o.BatchSize,
			})
		},
	},
	{
		method: MethodIntegratedGradients, alias: "ig", title: "integrated gradients",
		params:   []Param{ParamBaseline, ParamReference, ParamSteps, ParamRule, ParamTolerance},
		defaults: Options{Tolerance: DefaultTolerance},
		run: func(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error) {
			return IntegratedGradients(ctx, m, x, target, IGOptions{
				Rule: o.Rule, Points: o.Points, Tolerance: o.Tolerance,
				Baselines: o.baselines(), BatchSize: o.BatchSize,
			})
		},
	},
	{
		// The default draw count is SmoothGrad's copy count, the command
		// line's one -samples default, not ExpectedGradientsOptions'
		// DefaultDraws.
		method: MethodExpectedGradients, alias: "expected-grad", title: "expected gradients",
		params:   []Param{ParamReference, ParamSamples, ParamSeed, ParamTolerance},
		defaults: Options{Samples: DefaultSamples, Seed: DefaultSeed, Tolerance: DefaultExpectedTolerance},
		run: func(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error) {
			return ExpectedGradients(ctx, m, x, target, ExpectedGradientsOptions{
				Reference: o.Reference, Samples: o.Samples, Seed: o.Seed,
				Tolerance: o.Tolerance, BatchSize: o.BatchSize,
			})
		},
	},
}

func (m Method) spec() (*methodSpec, bool) {
	for i := range methodSpecs {
		if methodSpecs[i].method == m {
			return &methodSpecs[i], true
		}
	}
	return nil, false
}

// String returns the canonical name.
func (m Method) String() string { return string(m) }

// Alias returns the method's short name ("ig" for integrated gradients),
// or the canonical name when it has none.
func (m Method) Alias() string {
	if s, ok := m.spec(); ok && s.alias != "" {
		return s.alias
	}
	return string(m)
}

// Title returns the method's name in running text: "integrated
// gradients", "gradient × input".
func (m Method) Title() string {
	if s, ok := m.spec(); ok {
		return s.title
	}
	return string(m)
}

// Params returns the parameters the method reads, in a fixed order; nil
// for an unknown method.
func (m Method) Params() []Param {
	if s, ok := m.spec(); ok {
		return slices.Clone(s.params)
	}
	return nil
}

// Reads reports whether the method reads parameter p.
func (m Method) Reads(p Param) bool {
	s, ok := m.spec()
	return ok && slices.Contains(s.params, p)
}

// Defaults returns the options the method runs with when a surface is
// given none: the values a zero field of Options takes, and Seed =
// DefaultSeed for the random methods.
func (m Method) Defaults() Options {
	o := Options{Method: m}
	if s, ok := m.spec(); ok {
		o = s.defaults
		o.Method = m
	}
	return o
}

// Methods returns every method, in a fixed order.
func Methods() []Method {
	out := make([]Method, len(methodSpecs))
	for i, s := range methodSpecs {
		out[i] = s.method
	}
	return out
}

// MethodNames lists the methods for a message: each canonical name, with
// its alias in parentheses.
func MethodNames() string {
	names := make([]string, len(methodSpecs))
	for i, s := range methodSpecs {
		names[i] = string(s.method)
		if s.alias != "" {
			names[i] += " (" + s.alias + ")"
		}
	}
	return strings.Join(names, ", ")
}

// ParseMethod returns the method called s, by its canonical name or its
// alias. An unknown name is an error wrapping ErrOptions.
func ParseMethod(s string) (Method, error) {
	for _, spec := range methodSpecs {
		if s == string(spec.method) || (s == spec.alias && s != "") {
			return spec.method, nil
		}
	}
	return "", fmt.Errorf("%w: method %q, want one of %s", ErrOptions, s, MethodNames())
}

// Attribute runs o.Method on output target of m at x with the parameters
// of o (see Options for the defaults).
func Attribute(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error) {
	s, ok := o.Method.spec()
	if !ok {
		return nil, fmt.Errorf("%w: method %q, want one of %s", ErrOptions, o.Method, MethodNames())
	}
	return s.run(ctx, m, x, target, o.withDefaults())
}

// withDefaults fills zero parameters from the method's defaults.
func (o Options) withDefaults() Options {
	d := o.Method.Defaults()
	if o.Tolerance == 0 {
		o.Tolerance = d.Tolerance
	}
	if o.Samples == 0 {
		o.Samples = d.Samples
	}
	if o.Noise == 0 {
		o.Noise = d.Noise
	}
	return o
}

// baselines returns the baselines, a mean or median baseline without data
// of its own given the reference set.
func (o Options) baselines() []Baseline {
	if o.Reference == nil {
		return o.Baselines
	}
	out := slices.Clone(o.Baselines)
	for i, b := range out {
		if (b.Kind == BaselineMean || b.Kind == BaselineMedian) && b.Reference == nil {
			out[i].Reference = o.Reference
		}
	}
	return out
}

// Settings returns what o asks for in the vocabulary of Result.Settings,
// defaults filled in: the method and the parameters it reads. It is known
// before any model call; a Result's Settings add what the call found (the
// final point count of an automatic rule, the batch size). Baselines are
// described without their data, the reference set of expected gradients
// by its size.
func (o Options) Settings() Settings {
	o = o.withDefaults()
	s := Settings{Method: o.Method}
	for _, p := range o.Method.Params() {
		switch p {
		case ParamBaseline:
			specs := o.Baselines
			if len(specs) == 0 {
				specs = []Baseline{{}}
			}
			s.Baselines = describe(specs)
		case ParamReference:
			// A method with baselines reads the reference set through
			// them, and the baselines' record says so.
			if !o.Method.Reads(ParamBaseline) {
				s.References = len(o.Reference)
			}
		case ParamSteps:
			if o.Points > 0 {
				s.Points = o.Points
			} else {
				s.Auto, s.MaxPoints = true, DefaultMaxPoints
			}
		case ParamRule:
			s.Rule = o.Rule.String()
		case ParamTolerance:
			s.Tolerance = o.Tolerance
		case ParamSamples:
			s.Samples = o.Samples
		case ParamNoise:
			s.Noise = o.Noise
		case ParamSeed:
			s.Seed = o.Seed
		case ParamAbs:
			s.Absolute = o.Absolute
		case ParamVariant:
			s.Variant = o.Variant.String()
		}
	}
	return s
}
