package fidelity

import (
	"context"
	"fmt"
	"math"
	"strings"

	"github.com/apportion/apportion/gradattr"
)

// Metric names a score Assess computes.
type Metric string

// The metrics, in the order reports show them.
const (
	// MetricDeletion is the area under the deletion curve (Deletion),
	// beside the mean area of random orders.
	MetricDeletion Metric = "deletion"
	// MetricInsertion is the area under the insertion curve (Insertion),
	// beside the mean area of random orders.
	MetricInsertion Metric = "insertion"
	// MetricInfidelity is Infidelity under Gaussian and under baseline
	// perturbations.
	MetricInfidelity Metric = "infidelity"
	// MetricSensitivity is MaxSensitivity.
	MetricSensitivity Metric = "sensitivity"
	// MetricRandomization is the model-parameter randomization test
	// (Randomization).
	MetricRandomization Metric = "randomization"
	// MetricCompleteness is the share of samples whose completeness check
	// passed, for the methods that judge one.
	MetricCompleteness Metric = "completeness"
)

// Metrics returns every metric, in order.
func Metrics() []Metric {
	return []Metric{MetricDeletion, MetricInsertion, MetricInfidelity, MetricSensitivity, MetricRandomization, MetricCompleteness}
}

// ParseMetrics reads a comma-separated list of metric names.
func ParseMetrics(s string) ([]Metric, error) {
	var out []Metric
	for _, name := range strings.Split(s, ",") {
		name = strings.TrimSpace(name)
		found := false
		for _, m := range Metrics() {
			if string(m) == name {
				out, found = append(out, m), true
			}
		}
		if !found {
			names := make([]string, len(Metrics()))
			for i, m := range Metrics() {
				names[i] = string(m)
			}
			return nil, fmt.Errorf("%w: metric %q, want one of %s", ErrOptions, name, strings.Join(names, ", "))
		}
	}
	return out, nil
}

// The defaults of Config's zero fields.
const (
	DefaultRandomOrders     = 20
	DefaultDraws            = 32
	DefaultSensitivityDraws = 8
	DefaultNoise            = 0.1
	DefaultRadius           = 0.05
	// DefaultBudget lets Shapley values of the pumps demo's eight
	// features (25 501 passes of 8 values) repeat, not those of the welds
	// demo's 64 patches (65 569 passes of 1024 values).
	DefaultBudget = 1 << 24
)

// Config is what Assess scores: methods on a model and its samples. Zero
// fields take the defaults above.
type Config struct {
	// Model is the model explained.
	Model gradattr.Model
	// Samples are the samples. Bad[i], when Bad is given and Bad[i] is not
	// nil, says why sample i could not be read: it is reported and
	// skipped, as is a sample of the wrong size or with a NaN.
	Samples [][]float64
	Bad     []error
	// Methods are the methods scored, each run with Options; nil is every
	// method of gradattr's table that attributes to the input (Scorable).
	Methods []gradattr.Method
	// Metrics are the metrics computed; nil is every one.
	Metrics []Metric
	// Target is the output explained, or gradattr.TargetTop for each
	// sample's largest output of the trained model.
	Target int
	// Reference is the reference set the methods that read one get.
	Reference [][]float64
	// Baseline replaces removed features (deletion, insertion, the
	// baseline perturbation); nil is zero.
	Baseline []float64
	// Groups are removed, inserted and perturbed whole; nil is one unit
	// per feature.
	Groups []gradattr.Group
	// Steps is the number of steps of the deletion and insertion curves;
	// 0 is one per unit.
	Steps int
	// RandomOrders is the number of random orders drawn per sample.
	RandomOrders int
	// Draws is the number of perturbations of infidelity and
	// SensitivityDraws the number of points of max-sensitivity.
	Draws, SensitivityDraws int
	// Noise and Radius scale the Gaussian perturbations, σ_i = Noise·s_i,
	// and max-sensitivity's box, r_i = Radius·s_i, by Scale.
	Noise, Radius float64
	// Scale is s_i per feature; nil is the standard deviation of each
	// feature over Reference (or, without one, the samples) for samples
	// of one axis, and of all values for images.
	Scale []float64
	// Layers names the layers Randomized randomizes, from the input to
	// the output; Randomized returns the cascade. Without them the
	// randomization test is skipped.
	Layers     []string
	Randomized Randomized
	// Budget bounds the cost of the metrics that repeat a method's
	// attribution (max-sensitivity and randomization, 1 + SensitivityDraws
	// + len(Layers) attributions per sample): a method whose one
	// attribution evaluates more than Budget input values (model passes,
	// by gradattr.Options.Estimate, times the features of a sample) is
	// scored without them. 0 is DefaultBudget; negative is no bound.
	Budget int64
	// Seed seeds every draw: the methods' own (gradattr.Options.Seed),
	// the random orders, the perturbations.
	Seed uint64
	// Progress, when not nil, is called after each sample.
	Progress func(done, total int)
}

// Report is the scores of every method.
type Report struct {
	// Samples is the number of samples scored; Skipped those that were
	// not.
	Samples int       `json:"samples"`
	Skipped []Skipped `json:"skipped"`
	// Metrics are the metrics computed.
	Metrics []Metric `json:"metrics"`
	// Fractions are the steps of the curves (shares of units moved).
	Fractions []float64 `json:"fractions,omitempty"`
	// Random holds the areas and mean curves of random orders.
	Random *Random `json:"random,omitempty"`
	// Layers names the layers randomized, from the input to the output.
	Layers []string `json:"layers,omitempty"`
	// Methods holds one entry per method, in order.
	Methods []MethodScores `json:"methods"`
	// Settings records what the scores were computed with.
	Settings Settings `json:"settings"`
}

// Settings record the parameters of the metrics, defaults filled in.
type Settings struct {
	Seed             uint64  `json:"seed"`
	Target           int     `json:"target"`
	Units            int     `json:"units"`
	Grouped          bool    `json:"grouped"`
	Steps            int     `json:"steps"`
	RandomOrders     int     `json:"random_orders"`
	Draws            int     `json:"draws"`
	SensitivityDraws int     `json:"sensitivity_draws"`
	Noise            float64 `json:"noise"`
	Radius           float64 `json:"radius"`
}

// Skipped is a sample that was not scored, or a method that failed on it.
type Skipped struct {
	Index int    `json:"index"`
	Error string `json:"error"`
}

// Random is the reference of random orders: the mean area per sample,
// summarised across samples, and the mean curves.
type Random struct {
	Deletion       *Interval `json:"deletion,omitempty"`
	Insertion      *Interval `json:"insertion,omitempty"`
	DeletionCurve  []float64 `json:"deletion_curve,omitempty"`
	InsertionCurve []float64 `json:"insertion_curve,omitempty"`
}

// MethodScores are one method's scores: each metric's mean across samples
// with its 95% interval (nil when not computed or not applicable).
type MethodScores struct {
	// Method is the method's canonical name; Title its name in text.
	Method gradattr.Method `json:"method"`
	Title  string          `json:"title"`
	// NotScored says why the method was not run at all ("" when it was).
	NotScored string `json:"not_scored,omitempty"`
	// Unrepeated says why max-sensitivity and randomization were not
	// computed for the method ("" when they were or were not asked for).
	Unrepeated string `json:"unrepeated,omitempty"`
	// Failed lists the samples the method could not explain.
	Failed []Skipped `json:"failed,omitempty"`

	Deletion  *Interval `json:"deletion,omitempty"`
	Insertion *Interval `json:"insertion,omitempty"`
	// BeyondRandom counts the samples whose deletion area is below, and
	// insertion area above, the central 95% of their random orders'.
	DeletionBeyondRandom  int       `json:"deletion_beyond_random"`
	InsertionBeyondRandom int       `json:"insertion_beyond_random"`
	DeletionCurve         []float64 `json:"deletion_curve,omitempty"`
	InsertionCurve        []float64 `json:"insertion_curve,omitempty"`

	InfidelityGaussian *Interval `json:"infidelity_gaussian,omitempty"`
	InfidelityBaseline *Interval `json:"infidelity_baseline,omitempty"`
	Sensitivity        *Interval `json:"sensitivity,omitempty"`

	// Randomization holds one entry per depth, from the output layer
	// down.
	Randomization []RandomizationScores `json:"randomization,omitempty"`

	// Completeness counts the samples whose completeness check was judged
	// and passed; nil for methods that judge none.
	Completeness *Share `json:"completeness,omitempty"`
}

// RandomizationScores summarise one depth of the cascade.
type RandomizationScores struct {
	Depth    int       `json:"depth"`
	Layer    string    `json:"layer"` // the deepest layer randomized
	Spearman *Interval `json:"spearman"`
	SSIM     *Interval `json:"ssim,omitempty"`
}

// Share is a count of samples that passed out of those judged.
type Share struct {
	Passed int `json:"passed"`
	Judged int `json:"judged"`
}

// Last returns the scores after every layer is randomized; nil when the
// test did not run.
func (s *MethodScores) Last() *RandomizationScores {
	if len(s.Randomization) == 0 {
		return nil
	}
	return &s.Randomization[len(s.Randomization)-1]
}

// streams separate the draws of the metrics: a sample's stream is its
// index times streamStride plus the metric's offset.
const (
	streamStride      = 8
	streamOrders      = 1
	streamGaussian    = 2
	streamBaseline    = 3
	streamSensitivity = 4
)

// Assess scores each method on each good sample and summarises the scores
// across samples. A sample that cannot be read or scored is reported in
// Skipped; a method that fails on a sample, in its Failed. The error
// returned is one that stops the whole run: a bad option, a cancelled
// context.
func Assess(ctx context.Context, c Config) (*Report, error) {
	c = c.withDefaults()
	if c.Model == nil {
		return nil, fmt.Errorf("%w: nil model", ErrModel)
	}
	var shape []int
	var nout int
	if err := safe("describing the model", func() error {
		shape, nout = c.Model.InputShape(), c.Model.OutputSize()
		return nil
	}); err != nil {
		return nil, err
	}
	size := 1
	for _, d := range shape {
		size *= d
	}
	u, err := units(size, c.Groups)
	if err != nil {
		return nil, err
	}
	if c.Baseline != nil {
		if err := checkVector("the baseline", c.Baseline, size); err != nil {
			return nil, err
		}
	}
	for k, r := range c.Reference {
		if err := checkVector(fmt.Sprintf("reference sample %d", k), r, size); err != nil {
			return nil, err
		}
	}
	if c.Target != gradattr.TargetTop && (c.Target < 0 || c.Target >= nout) {
		return nil, fmt.Errorf("%w: target %d, the model has outputs 0..%d", ErrInput, c.Target, nout-1)
	}
	steps := c.Steps
	if steps <= 0 || steps > len(u) {
		steps = len(u)
	}
	has := map[Metric]bool{}
	for _, m := range c.Metrics {
		has[m] = true
	}
	if c.Randomized == nil || len(c.Layers) == 0 {
		delete(has, MetricRandomization)
	}
	rep := &Report{Skipped: []Skipped{}, Metrics: c.Metrics, Settings: Settings{
		Seed: c.Seed, Target: c.Target, Units: len(u), Grouped: c.Groups != nil, Steps: steps, RandomOrders: c.RandomOrders,
		Draws: c.Draws, SensitivityDraws: c.SensitivityDraws, Noise: c.Noise, Radius: c.Radius,
	}}
	if has[MetricRandomization] {
		rep.Layers = c.Layers
	}

	// Check the samples, and the scale of the perturbations from them.
	var good []int
	for i, x := range c.Samples {
		var err error
		switch {
		case i < len(c.Bad) && c.Bad[i] != nil:
			err = c.Bad[i]
		default:
			err = checkVector("the sample", x, size)
		}
		if err != nil {
			rep.Skipped = append(rep.Skipped, Skipped{Index: i, Error: err.Error()})
			continue
		}
		good = append(good, i)
	}
	scale := c.Scale
	if scale == nil {
		rows := c.Reference
		if rows == nil {
			for _, i := range good {
				rows = append(rows, c.Samples[i])
			}
		}
		scale = featureScale(rows, size, len(shape) >= 2)
	} else if err := checkVector("the scale", scale, size); err != nil {
		return nil, err
	}
	sigma, radius := make([]float64, size), make([]float64, size)
	for i, s := range scale {
		sigma[i], radius[i] = c.Noise*s, c.Radius*s
	}

	type perMethod struct {
		del, ins, gauss, base, sens []float64
		delCurve, insCurve          []float64
		spear, ssim                 [][]float64 // [depth][sample]
		judged, passed              int
		curves                      int
	}
	acc := make([]perMethod, len(c.Methods))
	scores := make([]MethodScores, len(c.Methods))
	for k, m := range c.Methods {
		scores[k] = MethodScores{Method: m, Title: m.Title()}
		if NeedsReference(m) && c.Reference == nil {
			scores[k].NotScored = "it needs a reference set"
		}
		if (has[MetricSensitivity] || has[MetricRandomization]) && c.Budget > 0 {
			cost, err := c.Options(m).Estimate(shape)
			if err != nil {
				return nil, err
			}
			if n := int64(cost.ForwardPasses+cost.GradientEvals) * int64(size); n > c.Budget {
				scores[k].Unrepeated = fmt.Sprintf("one attribution evaluates %d input values, more than the budget of %d", n, c.Budget)
			}
		}
		acc[k].spear = make([][]float64, len(c.Layers))
		acc[k].ssim = make([][]float64, len(c.Layers))
	}
	var randDel, randIns []float64
	randDelCurve, randInsCurve := make([]float64, steps+1), make([]float64, steps+1)
	curveOpt := CurveOptions{Baseline: c.Baseline, Groups: c.Groups, Steps: c.Steps}
	nan := math.NaN()

	for done, i := range good {
		x := c.Samples[i]
		target := c.Target
		if target == gradattr.TargetTop {
			var out []float64
			err := safe("running the model", func() (err error) {
				out, err = c.Model.Forward(ctx, x, 1)
				return err
			})
			if err == nil && len(out) != nout {
				err = fmt.Errorf("%w: the model returned %d values, want %d", ErrModel, len(out), nout)
			}
			if err != nil {
				if ctx.Err() != nil {
					return nil, ctx.Err()
				}
				rep.Skipped = append(rep.Skipped, Skipped{Index: i, Error: err.Error()})
				continue
			}
			target = gradattr.Top(out)
		}
		stream := uint64(i) * streamStride
		// The random orders are the same for every method.
		var delLo, insHi float64
		if has[MetricDeletion] || has[MetricInsertion] {
			dels, inss, err := RandomCurves(ctx, c.Model, x, target, curveOpt, c.RandomOrders, c.Seed, stream+streamOrders)
			if err != nil {
				if ctx.Err() != nil {
					return nil, ctx.Err()
				}
				rep.Skipped = append(rep.Skipped, Skipped{Index: i, Error: err.Error()})
				continue
			}
			da, ia := make([]float64, len(dels)), make([]float64, len(inss))
			for k := range dels {
				da[k], ia[k] = dels[k].Area, inss[k].Area
				for s := range randDelCurve {
					randDelCurve[s] += dels[k].Outputs[s] / float64(len(dels)*len(good))
					randInsCurve[s] += inss[k].Outputs[s] / float64(len(inss)*len(good))
				}
			}
			randDel, randIns = append(randDel, mean(da)), append(randIns, mean(ia))
			delLo, insHi = quantile(da, 0.025), quantile(ia, 0.975)
			if rep.Fractions == nil {
				rep.Fractions = dels[0].Fractions
			}
		}
		rep.Samples++

		for k, m := range c.Methods {
			o := c.Options(m)
			a := &acc[k]
			sc := &scores[k]
			if sc.NotScored != "" {
				continue
			}
			vals := map[string]float64{"del": nan, "ins": nan, "gauss": nan, "base": nan, "sens": nan}
			fail := func(err error) {
				sc.Failed = append(sc.Failed, Skipped{Index: i, Error: err.Error()})
			}
			r, err := runMethod(ctx, o, c.Model, x, target)
			if err != nil {
				if ctx.Err() != nil {
					return nil, ctx.Err()
				}
				fail(err)
			} else {
				attr := r.Attributions
				// A result with a completeness record apportions the
				// output's change: its values are shares, not slopes.
				shares := r.Completeness != nil
				if cp := r.Completeness; cp != nil && cp.Judged {
					a.judged++
					if cp.OK {
						a.passed++
					}
				}
				err = func() error {
					if has[MetricDeletion] || has[MetricInsertion] {
						d, err := Deletion(ctx, c.Model, x, target, attr, curveOpt)
						if err != nil {
							return err
						}
						in, err := Insertion(ctx, c.Model, x, target, attr, curveOpt)
						if err != nil {
							return err
						}
						vals["del"], vals["ins"] = d.Area, in.Area
						if d.Area < delLo {
							sc.DeletionBeyondRandom++
						}
						if in.Area > insHi {
							sc.InsertionBeyondRandom++
						}
						if a.delCurve == nil {
							a.delCurve, a.insCurve = make([]float64, steps+1), make([]float64, steps+1)
						}
						for s := range a.delCurve {
							a.delCurve[s] += d.Outputs[s]
							a.insCurve[s] += in.Outputs[s]
						}
						a.curves++
					}
					if has[MetricInfidelity] {
						var err error
						vals["gauss"], err = Infidelity(ctx, c.Model, x, target, attr, InfidelityOptions{
							Perturbation: PerturbGaussian, Sigma: sigma, Baseline: c.Baseline, Shares: shares,
							Draws: c.Draws, Seed: c.Seed, Stream: stream + streamGaussian})
						if err != nil {
							return err
						}
						vals["base"], err = Infidelity(ctx, c.Model, x, target, attr, InfidelityOptions{
							Perturbation: PerturbBaseline, Baseline: c.Baseline, Shares: shares, Groups: c.Groups,
							Draws: c.Draws, Seed: c.Seed, Stream: stream + streamBaseline})
						if err != nil {
							return err
						}
					}
					if has[MetricSensitivity] && sc.Unrepeated == "" {
						var err error
						vals["sens"], err = MaxSensitivity(ctx, Method(o), c.Model, x, target, attr, SensitivityOptions{
							Radius: radius, Draws: c.SensitivityDraws, Seed: c.Seed, Stream: stream + streamSensitivity})
						if err != nil {
							return err
						}
					}
					if has[MetricRandomization] && sc.Unrepeated == "" {
						st, err := Randomization(ctx, Method(o), c.Randomized, len(c.Layers), x, shape, target, attr)
						if err != nil {
							return err
						}
						for d, s := range st {
							a.spear[d] = append(a.spear[d], s.Spearman)
							a.ssim[d] = append(a.ssim[d], s.SSIM)
						}
					}
					return nil
				}()
				if err != nil {
					if ctx.Err() != nil {
						return nil, ctx.Err()
					}
					fail(err)
				}
			}
			a.del, a.ins = append(a.del, vals["del"]), append(a.ins, vals["ins"])
			a.gauss, a.base = append(a.gauss, vals["gauss"]), append(a.base, vals["base"])
			a.sens = append(a.sens, vals["sens"])
		}
		if c.Progress != nil {
			c.Progress(done+1, len(good))
		}
	}

	if len(randDel) > 0 {
		rep.Random = &Random{Deletion: interval(randDel), Insertion: interval(randIns)}
		if has[MetricDeletion] {
			rep.Random.DeletionCurve = randDelCurve
		}
		if has[MetricInsertion] {
			rep.Random.InsertionCurve = randInsCurve
		}
		if !has[MetricDeletion] {
			rep.Random.Deletion = nil
		}
		if !has[MetricInsertion] {
			rep.Random.Insertion = nil
		}
	}
	for k := range c.Methods {
		a, sc := &acc[k], &scores[k]
		if has[MetricDeletion] {
			sc.Deletion = interval(a.del)
			sc.DeletionCurve = meanCurve(a.delCurve, a.curves)
		}
		if has[MetricInsertion] {
			sc.Insertion = interval(a.ins)
			sc.InsertionCurve = meanCurve(a.insCurve, a.curves)
		}
		if has[MetricInfidelity] {
			sc.InfidelityGaussian, sc.InfidelityBaseline = interval(a.gauss), interval(a.base)
		}
		if has[MetricSensitivity] {
			sc.Sensitivity = interval(a.sens)
		}
		if has[MetricRandomization] {
			for d := range c.Layers {
				if len(a.spear[d]) == 0 {
					break
				}
				sc.Randomization = append(sc.Randomization, RandomizationScores{
					Depth: d + 1, Layer: c.Layers[len(c.Layers)-1-d],
					Spearman: interval(a.spear[d]), SSIM: interval(a.ssim[d]),
				})
			}
		}
		if has[MetricCompleteness] && a.judged > 0 {
			sc.Completeness = &Share{Passed: a.passed, Judged: a.judged}
		}
	}
	rep.Methods = scores
	return rep, nil
}

// Options returns the options Assess runs method m with: its defaults
// (gradattr.Method.Defaults), the reference set, the seed, and the
// baseline as the baseline of the methods that read one.
func (c Config) Options(m gradattr.Method) gradattr.Options {
	o := m.Defaults()
	o.Reference, o.Seed = c.Reference, c.Seed
	if c.Baseline != nil && m.Reads(gradattr.ParamBaseline) {
		o.Baselines = []gradattr.Baseline{{Kind: gradattr.BaselineValues, Values: c.Baseline}}
	}
	if m.Perturbs() {
		o.Groups = c.Groups // the methods that switch features play the groups
	}
	return o
}

// NeedsReference reports whether method m cannot run without a reference
// set: it reads one and has no baseline to use instead (expected
// gradients).
func NeedsReference(m gradattr.Method) bool {
	return m.Reads(gradattr.ParamReference) && !m.Reads(gradattr.ParamBaseline)
}

// runMethod runs o, recovering a panic of the model.
func runMethod(ctx context.Context, o gradattr.Options, m gradattr.Model, x []float64, target int) (*gradattr.Result, error) {
	var r *gradattr.Result
	err := safe("computing the attribution", func() (err error) {
		r, err = gradattr.Attribute(ctx, m, x, target, o)
		return err
	})
	return r, err
}

// withDefaults fills the zero fields of c.
func (c Config) withDefaults() Config {
	if c.Methods == nil {
		c.Methods = Scorable()
	}
	if c.Metrics == nil {
		c.Metrics = Metrics()
	}
	if c.RandomOrders == 0 {
		c.RandomOrders = DefaultRandomOrders
	}
	if c.Draws == 0 {
		c.Draws = DefaultDraws
	}
	if c.SensitivityDraws == 0 {
		c.SensitivityDraws = DefaultSensitivityDraws
	}
	if c.Noise == 0 {
		c.Noise = DefaultNoise
	}
	if c.Radius == 0 {
		c.Radius = DefaultRadius
	}
	if c.Budget == 0 {
		c.Budget = DefaultBudget
	}
	return c
}

// featureScale returns the standard deviation of each feature over rows,
// or, for images, of all their values; 1 where it is zero or there are too
// few rows.
func featureScale(rows [][]float64, size int, image bool) []float64 {
	s := make([]float64, size)
	for i := range s {
		s[i] = 1
	}
	if len(rows) < 2 {
		return s
	}
	if image {
		var all []float64
		for _, r := range rows {
			all = append(all, r...)
		}
		if sd := stddev(all); sd > 0 {
			for i := range s {
				s[i] = sd
			}
		}
		return s
	}
	col := make([]float64, len(rows))
	for i := range s {
		for k, r := range rows {
			col[k] = r[i]
		}
		if sd := stddev(col); sd > 0 {
			s[i] = sd
		}
	}
	return s
}

func mean(v []float64) float64 {
	s := 0.0
	for _, x := range v {
		s += x
	}
	return s / float64(len(v))
}

func stddev(v []float64) float64 {
	m := mean(v)
	ss := 0.0
	for _, x := range v {
		ss += (x - m) * (x - m)
	}
	return math.Sqrt(ss / float64(len(v)-1))
}

func meanCurve(sum []float64, n int) []float64 {
	if n == 0 {
		return nil
	}
	out := make([]float64, len(sum))
	for i, v := range sum {
		out[i] = v / float64(n)
	}
	return out
}

// Scorable returns the methods of gradattr's table whose attributions are
// one per input feature, in the table's order: the metrics remove, insert
// and perturb input features in the order of their attributions. Grad-CAM
// is left out: its map covers a layer's positions, not the input's
// features.
func Scorable() []gradattr.Method {
	var ms []gradattr.Method
	for _, m := range gradattr.Methods() {
		if m != gradattr.MethodGradCAM {
			ms = append(ms, m)
		}
	}
	return ms
}
