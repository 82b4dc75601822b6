package gradattr

import (
	"encoding/json"
	"time"
)

// CompletenessFloor is ε in the relative completeness gap
//
//	relative_gap = |Σ_i a_i − (f(x) − f(x′))| / max(|f(x) − f(x′)|, ε)
//
// It keeps the ratio finite when the sample and the baseline give the same
// output; with ε = 1e-6 such a result must then sum to zero within
// tolerance·1e-6.
const CompletenessFloor = 1e-6

// Result is one attribution: one scalar per input feature for one output of
// one sample, with what it cost and the settings that reproduce it.
//
// The JSON encoding (snake_case keys, as below) is stable: keys are only
// ever added, never renamed or removed. Attributions are row-major with the
// shape in "shape"; "completeness" is absent for methods that have no
// reference point (gradient, SmoothGrad).
type Result struct {
	// Attributions holds one value per input feature, row-major in Shape.
	Attributions []float64 `json:"attributions"`
	// Shape is the model's input shape (one sample, no batch axis).
	Shape []int `json:"shape"`
	// Target is the explained output index.
	Target int `json:"target"`
	// Output is f(x)[Target].
	Output float64 `json:"output"`
	// Outputs holds all outputs of the sample, f(x).
	Outputs []float64 `json:"outputs"`
	// BaselineOutput is the target output at the reference point: f(x′)
	// (the mean over baselines when there are several) for integrated
	// gradients, the surrogate and occlusion, the mean of f over the
	// reference set for expected gradients and over the reference rows for
	// Shapley values, f(0) for gradient×input; 0 for gradient and
	// SmoothGrad.
	BaselineOutput float64 `json:"baseline_output"`
	// BaselineOutputs holds every output at the reference point, for the
	// methods that evaluate it as such: the mean over the reference rows
	// (Shapley values) or over the baselines (surrogate, occlusion); nil
	// for the others.
	BaselineOutputs []float64 `json:"baseline_outputs,omitempty"`
	// Completeness compares Σ Attributions with Output − BaselineOutput;
	// nil for gradient and SmoothGrad.
	Completeness *Completeness `json:"completeness,omitempty"`
	// StandardErrors holds the standard error of each attribution, for
	// the sampled estimators of Shapley values; nil otherwise. With groups
	// as players it is spread over their features as the attributions are.
	StandardErrors []float64 `json:"standard_errors,omitempty"`
	// Surrogate is the local surrogate model's fit; nil for other methods.
	Surrogate *SurrogateFit `json:"surrogate,omitempty"`
	// Groups holds the attributions per feature group when the options
	// asked for groups (Options.Groups or Options.Superpixels): for the
	// methods that switch groups on and off (Method.Perturbs) the values
	// the method computed for each group, for the others the sums of the
	// feature attributions.
	Groups *GroupedResult `json:"groups,omitempty"`
	// Cost counts the model evaluations spent.
	Cost Cost `json:"cost"`
	// Settings are the options in effect, defaults filled in.
	Settings Settings `json:"settings"`
}

// Completeness is the check Σ_i a_i = f(x) − f(x′) that integrated
// gradients satisfy exactly (Sundararajan et al. 2017, Proposition 1) and
// expected gradients in expectation (Erion et al. 2021).
//
//	gap          = Σ_i a_i − (f(x) − f(x′))          (signed)
//	relative_gap = |gap| / max(|f(x) − f(x′)|, ε)    (ε = CompletenessFloor)
//	ok           = judged && relative_gap ≤ tolerance
//
// Gradient×input has no such guarantee: its completeness against the zero
// baseline is reported with Judged false and OK false, which JSON writes as
// "ok": null (see MarshalJSON).
type Completeness struct {
	// Sum is Σ_i a_i.
	Sum float64 `json:"sum"`
	// Expected is f(x) − f(x′).
	Expected float64 `json:"expected"`
	// Gap is Sum − Expected.
	Gap float64 `json:"gap"`
	// RelativeGap is |Gap| / max(|Expected|, CompletenessFloor).
	RelativeGap float64 `json:"relative_gap"`
	// Tolerance is the relative gap the method was asked to meet.
	Tolerance float64 `json:"tolerance"`
	// Judged is true when the method promises completeness, so that OK
	// means something.
	Judged bool `json:"judged"`
	// OK is true when the check is judged and RelativeGap ≤ Tolerance,
	// or |Gap| is within the rounding of float32 outputs (two units in
	// the last place in float32 of the larger of |f(x)|, |f(x′)|).
	OK bool `json:"ok"`
}

// MarshalJSON writes the check with its JSON keys; "ok" is null when the
// check is not judged, since neither true nor false would be a verdict.
func (c Completeness) MarshalJSON() ([]byte, error) {
	type plain Completeness // the same fields, without this method
	var ok *bool
	if c.Judged {
		ok = &c.OK
	}
	return json.Marshal(struct {
		plain
		OK *bool `json:"ok"`
	}{plain(c), ok})
}

// Cost counts model evaluations, per sample: a batch of n points counts n.
type Cost struct {
	// GradientEvals is the number of samples sent through Model.Gradient
	// (one forward and one backward pass each).
	GradientEvals int `json:"gradient_evals"`
	// ForwardPasses is the number of samples sent through Model.Forward.
	ForwardPasses int `json:"forward_passes"`
	// Elapsed is the wall time of the whole call (JSON: nanoseconds).
	Elapsed time.Duration `json:"elapsed_ns"`
}

// Settings records the options a Result was computed with, defaults filled
// in, so that the same call can be made again. Fields that do not apply to
// the method are zero and omitted from JSON.
type Settings struct {
	// Method is the method run, by its canonical name.
	Method Method `json:"method"`
	// Absolute is set when the gradient's absolute value was taken.
	Absolute bool `json:"absolute,omitempty"`
	// Rule is the quadrature rule of integrated gradients.
	Rule string `json:"rule,omitempty"`
	// Points is the number of integration points of the final rule (per
	// baseline) for integrated gradients.
	Points int `json:"points,omitempty"`
	// Auto is set when the point count was chosen by refinement.
	Auto bool `json:"auto,omitempty"`
	// MaxPoints is the refinement cap of automatic integrated gradients.
	MaxPoints int `json:"max_points,omitempty"`
	// ErrorEstimate is the estimated relative L1 error of automatic
	// integrated gradients with the trapezoid rule, which refine until it
	// is at most the tolerance (the largest over the baselines).
	ErrorEstimate float64 `json:"error_estimate,omitempty"`
	// Exact is set when integrated gradients integrate exactly (asked for
	// with ExactAlways, or done).
	Exact bool `json:"exact,omitempty"`
	// Pieces is the number of pieces of the exact path integral (the
	// largest per baseline).
	Pieces int `json:"pieces,omitempty"`
	// MaxPieces is the piece limit of exact integrated gradients.
	MaxPieces int `json:"max_pieces,omitempty"`
	// ExactSkipped says why automatic integrated gradients integrated by
	// quadrature when the model offers the exact integral.
	ExactSkipped string `json:"exact_skipped,omitempty"`
	// Samples is the number of noisy copies (SmoothGrad) or draws
	// (expected gradients).
	Samples int `json:"samples,omitempty"`
	// Noise is SmoothGrad's noise level σ/(max x − min x).
	Noise float64 `json:"noise,omitempty"`
	// Sigma is SmoothGrad's σ per feature when given by the caller.
	Sigma []float64 `json:"sigma,omitempty"`
	// Variant is SmoothGrad's aggregate: "mean", "squared" or "variance".
	Variant string `json:"variant,omitempty"`
	// TimesInput is set when the attribution was multiplied by the input.
	TimesInput bool `json:"times_input,omitempty"`
	// CallerNoise is set when the noise or draws came from the caller,
	// not from Seed.
	CallerNoise bool `json:"caller_noise,omitempty"`
	// Tolerance is the relative completeness gap asked for.
	Tolerance float64 `json:"tolerance,omitempty"`
	// Seed seeds the PCG generator of the random methods.
	Seed uint64 `json:"seed,omitempty"`
	// BatchSize is the number of points per model call. Results do not
	// depend on it (bit for bit, when the model's value for a sample does
	// not depend on the rest of its batch).
	BatchSize int `json:"batch_size,omitempty"`
	// Baselines describes the baselines of integrated gradients.
	Baselines []Baseline `json:"baselines,omitempty"`
	// References is the size of the reference set of expected gradients
	// and Shapley values.
	References int `json:"references,omitempty"`
	// ReferenceRows is K, the number of reference rows Shapley values
	// average over.
	ReferenceRows int `json:"reference_rows,omitempty"`
	// Estimator is the estimator of Shapley values: auto (before the
	// call), exact, regression or permutation.
	Estimator string `json:"estimator,omitempty"`
	// Coalitions is the coalition budget of the sampled Shapley
	// estimators and of the surrogate.
	Coalitions int `json:"coalitions,omitempty"`
	// KernelWidth is the width of the surrogate's proximity kernel.
	KernelWidth float64 `json:"kernel_width,omitempty"`
	// Ridge is the surrogate's ridge penalty.
	Ridge float64 `json:"ridge,omitempty"`
	// Window is the occlusion window, [height, width], and Stride its
	// step.
	Window []int `json:"window,omitempty"`
	Stride int   `json:"stride,omitempty"`
	// Superpixels is the number of SLIC segments asked for, and
	// Compactness SLIC's m.
	Superpixels int     `json:"superpixels,omitempty"`
	Compactness float64 `json:"compactness,omitempty"`
	// Groups is the number of feature groups a method that switches
	// groups on and off played with (Options.Groups).
	Groups int `json:"groups,omitempty"`
}

// Top returns the index of the largest output, the first one on ties, and
// -1 when outputs is empty or all NaN. It is the usual target: the
// predicted class.
func Top(outputs []float64) int {
	best := -1
	for i, v := range outputs {
		if v != v {
			continue
		}
		if best < 0 || v > outputs[best] {
			best = i
		}
	}
	return best
}

// TargetTop asks a method to explain the largest output of the sample
// (see Top).
const TargetTop = -1
