// Package settingflags defines the command-line flags of explain.Settings
// that the apportion command and the Beam pipeline share: one table of
// their types, defaults and help texts, so that the two commands cannot
// drift apart. The commands read the values back through the flag set and
// explain.Settings.Set.
package settingflags

import (
	"flag"
	"fmt"
	"strings"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
)

// Define defines on fs one flag for each of fields, named name(f), or the
// field's own name when name is nil, with the type, default and help text
// of the table below. Fields the table does not have (the seed, whose help
// differs by command) are the caller's to define; Define panics on one, as
// flag.FlagSet does on a flag defined twice.
func Define(fs *flag.FlagSet, name func(explain.Field) string, fields ...explain.Field) {
	if name == nil {
		name = func(f explain.Field) string { return string(f) }
	}
	var aliases []string
	for _, m := range gradattr.Methods() {
		aliases = append(aliases, m.Alias())
	}
	ig, eg, sg := gradattr.MethodIntegratedGradients.Defaults(), gradattr.MethodExpectedGradients.Defaults(), gradattr.MethodSmoothGrad.Defaults()
	sh, su, oc := gradattr.MethodShapley.Defaults(), gradattr.MethodSurrogate.Defaults(), gradattr.MethodOcclusion.Defaults()
	for _, f := range fields {
		n := name(f)
		switch f {
		case explain.FieldMethod:
			fs.String(n, explain.DefaultMethod.Alias(), "attribution method: "+strings.Join(aliases, ", ")+" (or the canonical names "+gradattr.MethodNames()+")")
		case explain.FieldTarget:
			fs.String(n, explain.DefaultTargetText, "output element to explain: an index `N`, or top for the largest")
		case explain.FieldOutput:
			fs.String(n, "", "`name` of the model output to explain (default the first)")
		case explain.FieldLogits:
			fs.Bool(n, false, "explain the input of the Softmax, LogSoftmax or Sigmoid that produces the output (the logits)")
		case explain.FieldBaseline:
			fs.String(n, explain.DefaultBaselineText, "baseline `kind` for ig, surrogate and occlusion: zero, constant:V (every feature V), mean or median (of -reference), blur (Gaussian, σ = 2 pixels), blur:S (σ = S pixels), uniform:LO:HI (noise from -seed), or the path of a file of baseline samples (results averaged over them)")
		case explain.FieldReference:
			fs.String(n, "", "reference samples `file` for expected-grad, shapley and -baseline mean")
		case explain.FieldSteps:
			fs.String(n, explain.DefaultStepsText, "integration points for ig: a number `N` (at least 2 with the trapezoid rule, 1 with the others); exact for the exact integral of a piecewise-linear network; refine to refine a quadrature rule until its error estimate and completeness gap are within -tolerance (the trapezoid rule adds points where the gradient changes most); auto for exact where the network allows it and refine elsewhere")
		case explain.FieldRule:
			fs.String(n, "", "quadrature `rule` for ig: trapezoid, left, right, midpoint or gauss-legendre (default trapezoid)")
		case explain.FieldTolerance:
			fs.Float64(n, ig.Tolerance, fmt.Sprintf("relative completeness gap `R` to meet; expected-grad, complete only in expectation, uses %v unless given", eg.Tolerance))
		case explain.FieldSamples:
			fs.Int(n, sg.Samples, "noisy copies (smoothgrad) or baseline draws (expected-grad) `N`")
		case explain.FieldNoise:
			fs.Float64(n, sg.Noise, "smoothgrad noise level `R`: σ / (max x − min x)")
		case explain.FieldAbs:
			fs.Bool(n, false, "grad: the gradient's absolute value |∂f/∂x| (Simonyan et al. 2013), not its sign")
		case explain.FieldVariant:
			fs.String(n, gradattr.VariantMean.String(), "smoothgrad aggregate of the noisy copies' gradients: mean, squared (mean of squares) or variance")
		case explain.FieldReferenceRows:
			fs.Int(n, sh.ReferenceRows, "shapley: reference rows `K` to average over (a seeded sample when -reference has more; all, in order, otherwise)")
		case explain.FieldEstimator:
			fs.String(n, string(sh.Estimator), fmt.Sprintf("shapley `estimator`: auto (exact up to %d players, else regression), exact, regression or permutation", gradattr.AutoExactPlayers))
		case explain.FieldCoalitions:
			fs.Int(n, sh.Coalitions, "coalition budget `N` of shapley's sampled estimators, and the surrogate's coalitions")
		case explain.FieldKernelWidth:
			fs.Float64(n, su.KernelWidth, "surrogate: width `W` of the proximity kernel on the share of players switched off")
		case explain.FieldWindow:
			fs.String(n, fmt.Sprintf("%dx%d", oc.Window[0], oc.Window[1]), "occlusion window `HxW` in pixels, moved over images without groups")
		case explain.FieldStride:
			fs.Int(n, 0, "occlusion window step `S` in pixels (default half the window's shorter side)")
		case explain.FieldSuperpixels:
			fs.Int(n, 0, "make the feature groups about `N` SLIC superpixels of each image, for any method")
		case explain.FieldCompactness:
			fs.Float64(n, gradattr.DefaultCompactness, "SLIC compactness `M` of -superpixels: higher, more regular segments")
		case explain.FieldLayer:
			fs.String(n, "", "attribute to the value called `NAME` inside the model instead of its input (inspect -values lists them); grad-cam's default is the last value with spatial axes")
		case explain.FieldLayerBaseline:
			fs.String(n, explain.LayerBaselineInput, "the baseline at -layer: `input` (the value computed from the input's -baseline) or zero")
		case explain.FieldBaselineToken:
			fs.String(n, "", "a model of token ids: the baseline is the embedding of token `ID` at every position (a padding token), instead of zero embeddings")
		default:
			panic(fmt.Sprintf("settingflags: no flag for the setting %q", f))
		}
	}
}
