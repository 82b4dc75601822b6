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
	MethodShapley             Method = "shapley"
	MethodSurrogate           Method = "surrogate"
	MethodOcclusion           Method = "occlusion"
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

	ParamReferenceRows Param = "reference-rows" // Options.ReferenceRows
	ParamEstimator     Param = "estimator"      // Options.Estimator
	ParamCoalitions    Param = "coalitions"     // Options.Coalitions
	ParamKernelWidth   Param = "kernel-width"   // Options.KernelWidth
	ParamWindow        Param = "window"         // Options.Window
	ParamStride        Param = "stride"         // Options.Stride
)

// DefaultSeed is the seed Method.Defaults gives the random methods. An
// Options value takes its Seed as it is: its zero value is seed 0.
const DefaultSeed = 1

// Options selects a method and sets its parameters, one struct for every
// method, so that a surface (command-line flags, an HTTP request, a
// pipeline step) can carry any of them. Attribute runs the method.
//
// A zero Tolerance, Samples, Noise, ReferenceRows, Estimator, Coalitions,
// KernelWidth, Ridge, Window or Stride takes the value of Method.Defaults;
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
	// baselines from it, Shapley values average over ReferenceRows of its
	// rows, and a BaselineMean or BaselineMedian baseline without a
	// Reference of its own averages it.
	Reference [][]float64
	// ReferenceRows is K, the reference rows of Shapley values.
	ReferenceRows int
	// Estimator is the estimator of Shapley values.
	Estimator Estimator
	// Coalitions is the coalition budget of the sampled Shapley
	// estimators and the number of coalitions of the surrogate.
	Coalitions int
	// KernelWidth is the width of the surrogate's proximity kernel, and
	// Ridge its ridge penalty.
	KernelWidth float64
	Ridge       float64
	// Window and Stride are the occlusion window [height, width] and its
	// step; a zero Stride is half the window's shorter side.
	Window [2]int
	Stride int
	// Groups are groups of features. The methods that switch features on
	// and off (Method.Perturbs) play them as players, and they must then
	// partition the features; for the others the result carries the
	// attributions summed per group. Either way Result.Groups has them.
	Groups []Group
	// Superpixels, when > 0, makes the groups from the sample itself: about
	// that many SLIC superpixels of the image (see SuperpixelGroups), with
	// SLIC's Compactness (0 means DefaultCompactness). It excludes Groups.
	Superpixels int
	Compactness float64
	// BatchSize is the number of points per model call; 0 means
	// DefaultBatchSize, or DefaultForwardBatch for the methods that only
	// run the model forward.
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
	perturbs bool // switches groups on and off as players
	run      func(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error)
	// cost is the model evaluations of one sample of the given shape (size
	// values), at most; o has its defaults filled in.
	cost func(o Options, shape []int, size int) Cost
}

var methodSpecs = []methodSpec{
	{
		method: MethodGradient, alias: "grad", title: "gradient",
		params: []Param{ParamAbs},
		run: func(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error) {
			return Gradient(ctx, m, x, target, GradientOptions{Absolute: o.Absolute})
		},
		cost: func(Options, []int, int) Cost { return Cost{GradientEvals: 1, ForwardPasses: 1} },
	},
	{
		method: MethodGradientTimesInput, alias: "grad-input", title: "gradient × input",
		run: func(ctx context.Context, m Model, x []float64, target int, _ Options) (*Result, error) {
			return GradientTimesInput(ctx, m, x, target)
		},
		cost: func(Options, []int, int) Cost { return Cost{GradientEvals: 1, ForwardPasses: 2} },
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
		cost: func(o Options, _ []int, _ int) Cost { return Cost{GradientEvals: o.Samples, ForwardPasses: 1} },
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
		cost: func(o Options, _ []int, _ int) Cost {
			b := max(1, len(o.Baselines))
			points := o.Points
			if points == 0 {
				// Refinement reuses earlier points except under
				// Gauss–Legendre, whose passes sum to under twice the cap.
				points = DefaultMaxPoints
				if o.Rule == RuleGaussLegendre {
					points *= 2
				}
			}
			return Cost{GradientEvals: b * points, ForwardPasses: 1 + b}
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
		cost: func(o Options, _ []int, _ int) Cost {
			return Cost{GradientEvals: o.Samples, ForwardPasses: 1 + len(o.Reference)}
		},
	},
	{
		method: MethodShapley, title: "Shapley values", perturbs: true,
		params: []Param{ParamReference, ParamReferenceRows, ParamEstimator, ParamCoalitions, ParamSeed},
		defaults: Options{ReferenceRows: DefaultReferenceRows, Estimator: EstimatorAuto,
			Coalitions: DefaultCoalitions, Seed: DefaultSeed},
		run: func(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error) {
			return Shapley(ctx, m, x, target, ShapleyOptions{
				Reference: o.Reference, ReferenceRows: o.ReferenceRows, Estimator: o.Estimator,
				Coalitions: o.Coalitions, Seed: o.Seed, Groups: o.Groups, BatchSize: o.BatchSize,
			})
		},
		cost: func(o Options, _ []int, size int) Cost {
			k := o.ReferenceRows
			if len(o.Reference) > 0 {
				k = min(k, len(o.Reference))
			}
			var coalitions int
			if o.Superpixels > 0 && o.Groups == nil {
				// SLIC's count is known only from the image: the most any
				// count can take.
				coalitions = o.Coalitions
				switch o.Estimator {
				case EstimatorExact:
					coalitions = 1<<MaxExactPlayers - 2
				case EstimatorAuto:
					coalitions = max(coalitions, 1<<AutoExactPlayers-2)
				}
			} else {
				d := size
				if o.Groups != nil {
					d = len(o.Groups)
				}
				coalitions, _ = shapleyCoalitions(o.Estimator.choose(d), d, o.Coalitions) // an error spends none
			}
			return Cost{ForwardPasses: 1 + k + coalitions*k}
		},
	},
	{
		method: MethodSurrogate, title: "local surrogate", perturbs: true,
		params:   []Param{ParamBaseline, ParamReference, ParamCoalitions, ParamKernelWidth, ParamSeed},
		defaults: Options{Coalitions: DefaultCoalitions, KernelWidth: DefaultKernelWidth, Ridge: DefaultRidge, Seed: DefaultSeed},
		run: func(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error) {
			return Surrogate(ctx, m, x, target, SurrogateOptions{
				Baselines: o.baselines(), Coalitions: o.Coalitions, KernelWidth: o.KernelWidth,
				Ridge: o.Ridge, Seed: o.Seed, Groups: o.Groups, BatchSize: o.BatchSize,
			})
		},
		cost: func(o Options, _ []int, _ int) Cost {
			b := max(1, len(o.Baselines))
			return Cost{ForwardPasses: 1 + b + (o.Coalitions-2)*b}
		},
	},
	{
		method: MethodOcclusion, title: "occlusion", perturbs: true,
		params:   []Param{ParamBaseline, ParamReference, ParamWindow, ParamStride},
		defaults: Options{Window: [2]int{DefaultWindow, DefaultWindow}, Stride: DefaultWindow / 2},
		run: func(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error) {
			return Occlusion(ctx, m, x, target, OcclusionOptions{
				Baselines: o.baselines(), Window: o.Window, Stride: o.Stride, Groups: o.Groups, BatchSize: o.BatchSize,
			})
		},
		cost: func(o Options, shape []int, size int) Cost {
			b := max(1, len(o.Baselines))
			regions := size
			switch {
			case o.Groups != nil:
				regions = len(o.Groups)
			case o.Superpixels > 0 && len(shape) >= 2:
				regions = shape[len(shape)-2] * shape[len(shape)-1] // at most a segment per pixel
			case len(shape) >= 2:
				h, w := shape[len(shape)-2], shape[len(shape)-1]
				oh, ow, stride := OcclusionOptions{Window: o.Window, Stride: o.Stride}.window()
				regions = 0
				if oh <= h && ow <= w && stride > 0 {
					regions = ((h-oh)/stride + 1) * ((w-ow)/stride + 1)
				}
			}
			return Cost{ForwardPasses: 1 + b + regions*b}
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

// Perturbs reports whether the method switches features on and off
// (Shapley values, the surrogate, occlusion): with groups, it plays the
// groups as players, which must then partition the features.
func (m Method) Perturbs() bool {
	s, ok := m.spec()
	return ok && s.perturbs
}

// Attribute runs o.Method on output target of m at x with the parameters
// of o (see Options for the defaults). With groups (Options.Groups, or
// superpixels of x), Result.Groups holds the attributions per group.
func Attribute(ctx context.Context, m Model, x []float64, target int, o Options) (*Result, error) {
	s, ok := o.Method.spec()
	if !ok {
		return nil, fmt.Errorf("%w: method %q, want one of %s", ErrOptions, o.Method, MethodNames())
	}
	o = o.withDefaults()
	var segments []int
	if o.Superpixels != 0 {
		if o.Groups != nil {
			return nil, fmt.Errorf("%w: groups and superpixels both given; superpixels make the groups", ErrOptions)
		}
		if m == nil {
			return nil, fmt.Errorf("%w: nil model", ErrModel)
		}
		var shape []int
		if err := callSafe("InputShape", func() { shape = m.InputShape() }); err != nil {
			return nil, err
		}
		var err error
		if o.Groups, segments, err = SuperpixelGroups(x, shape, o.Superpixels, o.Compactness); err != nil {
			return nil, err
		}
	}
	groups := o.Groups
	if !s.perturbs {
		o.Groups = nil
	}
	r, err := s.run(ctx, m, x, target, o)
	if err != nil {
		return nil, err
	}
	if groups != nil && r.Groups == nil {
		if r.Groups, err = r.Grouped(groups); err != nil {
			return nil, err
		}
	}
	if r.Groups != nil {
		r.Groups.Segments = segments
	}
	if o.Superpixels != 0 {
		r.Settings.Superpixels, r.Settings.Compactness = o.Superpixels, o.Compactness
	}
	return r, nil
}

// Estimate returns the model evaluations Attribute spends on one sample of
// the given shape with options o, at most: the point cap of automatic
// integrated gradients, the coalitions of the automatic Shapley estimator
// whichever it picks, one region per pixel for occlusion of superpixels
// (whose count only the image decides). A server can hold a request to a
// budget with it before any model call.
func (o Options) Estimate(shape []int) (Cost, error) {
	s, ok := o.Method.spec()
	if !ok {
		return Cost{}, fmt.Errorf("%w: method %q, want one of %s", ErrOptions, o.Method, MethodNames())
	}
	size, err := shapeSize(shape)
	if err != nil {
		return Cost{}, err
	}
	return s.cost(o.withDefaults(), shape, size), nil
}

// withDefaults fills zero parameters from the method's defaults.
func (o Options) withDefaults() Options {
	d := o.Method.Defaults()
	orDefault(&o.Tolerance, d.Tolerance)
	orDefault(&o.Samples, d.Samples)
	orDefault(&o.Noise, d.Noise)
	orDefault(&o.ReferenceRows, d.ReferenceRows)
	orDefault(&o.Estimator, d.Estimator)
	orDefault(&o.Coalitions, d.Coalitions)
	orDefault(&o.KernelWidth, d.KernelWidth)
	orDefault(&o.Ridge, d.Ridge)
	orDefault(&o.Window, d.Window)
	if o.Window != [2]int{} {
		orDefault(&o.Stride, max(1, min(o.Window[0], o.Window[1])/2))
	}
	if o.Superpixels != 0 {
		orDefault(&o.Compactness, DefaultCompactness)
	}
	return o
}

// orDefault sets *v to def when *v is the zero value.
func orDefault[T comparable](v *T, def T) {
	var zero T
	if *v == zero {
		*v = def
	}
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
		case ParamReferenceRows:
			s.ReferenceRows = o.ReferenceRows
		case ParamEstimator:
			s.Estimator = string(o.Estimator)
		case ParamCoalitions:
			s.Coalitions = o.Coalitions
		case ParamKernelWidth:
			s.KernelWidth, s.Ridge = o.KernelWidth, o.Ridge
		case ParamWindow:
			s.Window = []int{o.Window[0], o.Window[1]}
		case ParamStride:
			s.Stride = o.Stride
		}
	}
	if o.Superpixels != 0 {
		s.Superpixels, s.Compactness = o.Superpixels, o.Compactness
	}
	if o.Groups != nil && o.Method.Perturbs() {
		s.Groups = len(o.Groups)
	}
	return s
}
