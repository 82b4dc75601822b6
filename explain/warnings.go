package explain

import (
	"encoding/json"
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"

	"github.com/apportion/apportion/gradattr"
)

// Warning is what a result's numbers do not say by themselves: that they
// are near zero because the output is saturated or does not change, not
// because the features do not matter.
type Warning struct {
	// Code names the kind of warning: WarnSaturated, WarnNoChange or
	// WarnNegligible.
	Code string
	// Message says what was found and what it means, in words.
	Message string
	// Suggest are the settings worth changing, in the order to try them.
	Suggest []Field
}

// The warning codes.
const (
	// WarnSaturated: the output is a probability within SaturationMargin
	// of 0 or 1, and the method reads gradients at or around the sample,
	// where they all but vanish.
	WarnSaturated = "saturated"
	// WarnNoChange: the output at the sample and at the baseline differ by
	// at most gradattr.CompletenessFloor, so the attributions sum to about
	// zero.
	WarnNoChange = "no-change"
	// WarnNegligible: every attribution is negligible (see Negligible).
	WarnNegligible = "negligible"
	// WarnImprecise: integrated gradients reached the most points
	// automatic refinement may spend with the estimated error still above
	// the tolerance.
	WarnImprecise = "imprecise"
)

// SaturationMargin is how close to 0 or 1 a probability is saturated: the
// derivative of a softmax or sigmoid output p is at most p(1 − p) per unit
// of its logit, below 1e-6 there.
const SaturationMargin = 1e-6

// MarshalJSON writes {"code", "message", "suggest": [field names]}.
func (w Warning) MarshalJSON() ([]byte, error) {
	suggest := make([]string, len(w.Suggest))
	for i, f := range w.Suggest {
		suggest[i] = string(f)
	}
	return json.Marshal(struct {
		Code    string   `json:"code"`
		Message string   `json:"message"`
		Suggest []string `json:"suggest"`
	}{w.Code, w.Message, suggest})
}

// Negligible reports whether every attribution of r, at sample x, is too
// small to mean anything: its first-order effect on the output is below
// gradattr.CompletenessFloor for every feature. The effect of a_i is |a_i|
// for the methods whose attributions are shares of the output (they report
// completeness), and |a_i|·max(|x_i|, 1) for the gradient and SmoothGrad,
// whose attributions are per unit of the feature (the change of the output
// when the feature moves by its own size, or by one unit); SmoothGrad's
// squared and variance variants are first rooted.
func Negligible(r *gradattr.Result, x []float64) bool {
	for i, a := range r.Attributions {
		e := math.Abs(a)
		if r.Completeness == nil {
			if v := r.Settings.Variant; v == gradattr.VariantSquared.String() || v == gradattr.VariantVariance.String() {
				e = math.Sqrt(e)
			}
			if i < len(x) {
				e *= math.Max(math.Abs(x[i]), 1)
			}
		}
		if !(e < gradattr.CompletenessFloor) {
			return false
		}
	}
	return true
}

// warnings returns the warnings of result r at sample x.
func (e *Explainer) warnings(x []float64, r *gradattr.Result) []Warning {
	w := e.valueWarnings(x, r)
	if st := r.Settings; st.Auto && st.ErrorEstimate > st.Tolerance {
		w = append(w, Warning{Code: WarnImprecise, Suggest: []Field{FieldTolerance, FieldSteps}, Message: fmt.Sprintf(
			"the integral's estimated error is %s of the attributions' size, above the tolerance %s, after %d points, the most automatic refinement spends: the attributions may be off by that much",
			num(st.ErrorEstimate), num(st.Tolerance), r.Cost.GradientEvals)})
	}
	return w
}

// valueWarnings returns the warnings about what result r's values mean.
func (e *Explainer) valueWarnings(x []float64, r *gradattr.Result) []Warning {
	s := &e.settings
	probability := !s.Logits && e.model.producer(e.output) != "" && (e.model.producer(e.output) == "Softmax" || e.model.producer(e.output) == "Sigmoid")
	var logits []Field
	if probability {
		logits = []Field{FieldLogits}
	}
	atSample := s.Method == gradattr.MethodGradient || s.Method == gradattr.MethodGradientTimesInput || s.Method == gradattr.MethodSmoothGrad
	out := fmt.Sprintf("output %s[%d]", e.output, r.Target)
	if s.Method == gradattr.MethodGradCAM {
		if slices.ContainsFunc(r.Attributions, func(a float64) bool { return a != 0 }) {
			return nil
		}
		return []Warning{{Code: WarnNegligible, Message: fmt.Sprintf(
			"the map is 0 at every place: Σ_c α_c·A_c is at most 0 everywhere in %s, so by the gradient-weighted channels no place argues for %s (Grad-CAM keeps only positive evidence)",
			e.layer.l.Name(), out)}}
	}
	switch p := r.Output; {
	case probability && atSample && (p <= SaturationMargin || p >= 1-SaturationMargin):
		end := "0"
		if p > 0.5 {
			end = "1"
		}
		return []Warning{{Code: WarnSaturated, Suggest: logits, Message: fmt.Sprintf(
			"%s is %s, within %s of %s: the probability is saturated, its gradient all but vanishes, and so do these attributions, whatever the features do; the logits (the input of the final %s) are not saturated",
			out, num(p), num(SaturationMargin), end, e.model.producer(e.output))}}
	case r.Completeness != nil && r.Completeness.Judged && math.Abs(r.Output-r.BaselineOutput) <= gradattr.CompletenessFloor:
		return []Warning{{Code: WarnNoChange, Suggest: append([]Field{FieldBaseline}, logits...), Message: fmt.Sprintf(
			"%s is %s at the sample and %s at the baseline: with no change to share out, the attributions sum to about zero and say little about the features",
			out, num(r.Output), num(r.BaselineOutput))}}
	case Negligible(r, x) && s.Method == gradattr.MethodSmoothGrad && r.Settings.Sigma == nil:
		lo, hi := x[0], x[0]
		for _, v := range x {
			lo, hi = math.Min(lo, v), math.Max(hi, v)
		}
		noise := r.Settings.Noise
		return []Warning{{Code: WarnNegligible, Suggest: append([]Field{FieldNoise}, logits...), Message: fmt.Sprintf(
			"every attribution is negligible: none moves %s by as much as %s. SmoothGrad adds noise of σ = %s to every feature (%s of the range of the sample's values, %s); where the features have different scales, most noisy copies land where the output is flat",
			out, num(gradattr.CompletenessFloor), num(noise*(hi-lo)), num(noise), num(hi-lo))}}
	case Negligible(r, x):
		return []Warning{{Code: WarnNegligible, Suggest: logits, Message: fmt.Sprintf(
			"every attribution is negligible: none moves %s by as much as %s, so the output is flat around the sample (saturated, or beyond the kink of a ReLU)",
			out, num(gradattr.CompletenessFloor))}}
	}
	return nil
}

// num writes v with five significant digits, and an exponent without a
// leading zero: 1e-6.
func num(v float64) string {
	s := strconv.FormatFloat(v, 'g', 5, 64)
	s = strings.Replace(s, "e-0", "e-", 1)
	return strings.Replace(s, "e+0", "e+", 1)
}
