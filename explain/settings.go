package explain

import (
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// Field names a setting as the surfaces spell it: a command-line flag, a
// field of an HTTP request.
type Field string

// The fields. The method parameters are gradattr's (gradattr.Param).
const (
	FieldMethod    Field = "method"
	FieldTarget    Field = "target"
	FieldOutput    Field = "output"
	FieldLogits    Field = "logits"
	FieldBaseline  Field = Field(gradattr.ParamBaseline)
	FieldReference Field = Field(gradattr.ParamReference)
	FieldSteps     Field = Field(gradattr.ParamSteps)
	FieldRule      Field = Field(gradattr.ParamRule)
	FieldTolerance Field = Field(gradattr.ParamTolerance)
	FieldSamples   Field = Field(gradattr.ParamSamples)
	FieldNoise     Field = Field(gradattr.ParamNoise)
	FieldSeed      Field = Field(gradattr.ParamSeed)
	FieldAbs       Field = Field(gradattr.ParamAbs)
	FieldVariant   Field = Field(gradattr.ParamVariant)
	FieldGroups    Field = "groups"
)

// methodFields are the method parameters, in the order Check reports them.
var methodFields = []Field{FieldBaseline, FieldReference, FieldSteps, FieldRule, FieldTolerance, FieldSamples, FieldNoise, FieldSeed, FieldAbs, FieldVariant}

// ErrSettings is wrapped by every FieldError.
var ErrSettings = errors.New("explain: invalid settings")

// FieldError is a setting that is wrong. It names the field at fault and
// keeps the fields its message mentions apart from the words, so that each
// surface names them its own way: the command line as -steps, the HTTP API
// as "steps" (see Wording).
type FieldError struct {
	// Field is the setting at fault.
	Field Field
	// Input is set when the setting names data whose content is wrong (a
	// reference set of the wrong size), rather than a value given wrong.
	Input bool
	// parts are the message: Fields, named by the surface, and text.
	parts []any
	err   error
}

func fieldError(f Field, parts ...any) *FieldError {
	e := &FieldError{Field: f, parts: append([]any{f}, parts...)}
	for _, p := range parts {
		if err, ok := p.(error); ok && e.err == nil {
			e.err = err
		}
	}
	return e
}

// Error words the message with the fields' plain names.
func (e *FieldError) Error() string {
	return e.Wording(func(f Field) string { return string(f) })
}

// Wording words the message with each field named by name.
func (e *FieldError) Wording(name func(Field) string) string {
	var b strings.Builder
	for _, p := range e.parts {
		switch v := p.(type) {
		case Field:
			b.WriteString(name(v))
		case error:
			b.WriteString(v.Error())
		default:
			fmt.Fprint(&b, v)
		}
	}
	return b.String()
}

// Is reports ErrSettings.
func (e *FieldError) Is(target error) bool { return target == ErrSettings }

// Unwrap returns the error the message carries, if any.
func (e *FieldError) Unwrap() error { return e.err }

// DefaultBlurSigma is the Gaussian σ, in pixels, of the blur baseline when
// none is given.
const DefaultBlurSigma = 2.0

// Baseline is the baseline of integrated gradients as the surfaces ask for
// it: zero, a constant, the mean or median of the reference set (or,
// without one, of the samples explained), the sample blurred, uniform noise
// (seeded by Settings.Seed), or the samples of a file.
type Baseline struct {
	// Kind is gradattr.BaselineZero, BaselineConstant, BaselineMean,
	// BaselineMedian, BaselineBlur, BaselineUniform or BaselineValues.
	Kind gradattr.BaselineKind
	// Value is the constant of BaselineConstant.
	Value float64
	// Lo and Hi bound the noise of BaselineUniform.
	Lo, Hi float64
	// Sigma is the blur's σ in pixels.
	Sigma float64
	// Samples holds the baselines of BaselineValues; the results are
	// averaged over them.
	Samples *Dataset
}

// BaselineWords are the baselines ParseBaseline reads that are not files,
// as a message lists them.
const BaselineWords = "zero, constant:V, mean, median, blur, blur:S or uniform:LO:HI"

// ParseBaseline reads a baseline as the surfaces write it: zero,
// constant:V (every feature V), mean or median (of the reference set),
// blur (σ = DefaultBlurSigma), blur:S (σ = S pixels), uniform:LO:HI (noise
// drawn uniformly in [LO, HI)), or else the name of a file of baseline
// samples, which the caller reads into Samples.
func ParseBaseline(text string) (Baseline, error) {
	finite := func(s string) (float64, bool) {
		v, err := strconv.ParseFloat(s, 64)
		return v, err == nil && !math.IsNaN(v) && !math.IsInf(v, 0)
	}
	switch {
	case text == "zero":
		return Baseline{Kind: gradattr.BaselineZero}, nil
	case text == "mean":
		return Baseline{Kind: gradattr.BaselineMean}, nil
	case text == "median":
		return Baseline{Kind: gradattr.BaselineMedian}, nil
	case strings.HasPrefix(text, "constant:"):
		v, ok := finite(strings.TrimPrefix(text, "constant:"))
		if !ok {
			return Baseline{}, fieldError(FieldBaseline, " constant:V needs a finite number V, got ", strconv.Quote(strings.TrimPrefix(text, "constant:")))
		}
		return Baseline{Kind: gradattr.BaselineConstant, Value: v}, nil
	case strings.HasPrefix(text, "uniform:"):
		lo, hi, _ := strings.Cut(strings.TrimPrefix(text, "uniform:"), ":")
		l, okLo := finite(lo)
		h, okHi := finite(hi)
		if !okLo || !okHi || !(l < h) {
			return Baseline{}, fieldError(FieldBaseline, " uniform:LO:HI needs finite bounds LO < HI, got ", strconv.Quote(strings.TrimPrefix(text, "uniform:")))
		}
		return Baseline{Kind: gradattr.BaselineUniform, Lo: l, Hi: h}, nil
	case text == "blur":
		return Baseline{Kind: gradattr.BaselineBlur, Sigma: DefaultBlurSigma}, nil
	case strings.HasPrefix(text, "blur:"):
		s := strings.TrimPrefix(text, "blur:")
		v, err := strconv.ParseFloat(s, 64)
		if err != nil || !(v > 0) || math.IsInf(v, 0) {
			return Baseline{}, fieldError(FieldBaseline, " blur:S needs a positive σ in pixels, got ", strconv.Quote(s))
		}
		return Baseline{Kind: gradattr.BaselineBlur, Sigma: v}, nil
	}
	return Baseline{Kind: gradattr.BaselineValues, Samples: &Dataset{Name: text}}, nil
}

// Dataset is a named set of samples: a reference set, or baselines.
type Dataset struct {
	// Name names the set in documents: a file name, "demo:pumps_reference.csv".
	Name string
	// Digest is "sha256:" and the hex SHA-256 of the bytes the set was
	// read from. Summaries record it in place of Name, so that parts of a
	// data set summarised in different directories merge.
	Digest string
	// Batch holds the samples; nil until read.
	Batch *samples.Batch
}

// NewDataset returns the set of the samples b, read from raw, called name.
func NewDataset(name string, raw []byte, b *samples.Batch) *Dataset {
	sum := sha256.Sum256(raw)
	return &Dataset{Name: name, Digest: "sha256:" + hex.EncodeToString(sum[:]), Batch: b}
}

// Settings are what an explanation is asked for: the method and its
// parameters, the output explained, the baseline, the reference set and
// feature groups. A zero Tolerance, Samples or Noise takes the method's
// default (gradattr.Method.Defaults). Start from Defaults; the surfaces
// set fields from their text with Set, which Check then judges together.
type Settings struct {
	// Method is the attribution method.
	Method gradattr.Method
	// Target is the output index explained, or gradattr.TargetTop.
	Target int
	// Output names the model output explained; "" means the first.
	Output string
	// Logits explains the input of the output's final Softmax,
	// LogSoftmax or Sigmoid.
	Logits bool
	// Baseline is the baseline of integrated gradients.
	Baseline Baseline
	// Steps fixes the integration points of integrated gradients; 0
	// refines them automatically.
	Steps int
	// Rule is the quadrature rule of integrated gradients.
	Rule gradattr.Rule
	// Tolerance, Samples, Noise and Seed are the methods' (see
	// gradattr.Options).
	Tolerance float64
	Samples   int
	Noise     float64
	Seed      uint64
	// Absolute takes the gradient's absolute value; Variant is
	// SmoothGrad's aggregate (see gradattr.Options).
	Absolute bool
	Variant  gradattr.Variant
	// Reference is the reference set: expected gradients draw from it,
	// the mean baseline averages it.
	Reference *Dataset
	// Groups are feature groups whose attributions are also reported
	// summed.
	Groups []gradattr.Group

	given map[Field]bool
}

// DefaultMethod is the method of Defaults.
const DefaultMethod = gradattr.MethodIntegratedGradients

// Defaults returns the settings of a request that gives none: integrated
// gradients of the largest output against the zero baseline, with the
// methods' defaults and seed gradattr.DefaultSeed.
func Defaults() Settings {
	return Settings{
		Method:   DefaultMethod,
		Target:   gradattr.TargetTop,
		Baseline: Baseline{Kind: gradattr.BaselineZero},
		Seed:     gradattr.DefaultSeed,
	}
}

// The texts of the defaults that are not numbers, as the surfaces show them.
const (
	DefaultTargetText   = "top"
	DefaultBaselineText = "zero"
	DefaultStepsText    = "auto"
)

// Given reports whether field f was set with Set.
func (s *Settings) Given(f Field) bool { return s.given[f] }

// Set sets field f from its text as the surfaces write it and records it as
// given: method (a canonical name or an alias), target (an index or top),
// output, logits (true or false), baseline (see ParseBaseline), reference
// (the name of the set, read by the caller into Reference.Batch), steps
// (a count or auto), rule, tolerance, samples, noise, seed, abs (true or
// false) and variant (mean, squared or variance). A value out
// of range is a *FieldError.
func (s *Settings) Set(f Field, text string) error {
	if s.given == nil {
		s.given = map[Field]bool{}
	}
	if err := s.set(f, text); err != nil {
		return err
	}
	s.given[f] = true
	return nil
}

func (s *Settings) set(f Field, text string) error {
	switch f {
	case FieldMethod:
		m, err := gradattr.ParseMethod(text)
		if err != nil {
			return fieldError(f, " must be one of ", gradattr.MethodNames(), ", got ", strconv.Quote(text))
		}
		s.Method = m
	case FieldTarget:
		if text == "top" {
			s.Target = gradattr.TargetTop
			return nil
		}
		n, err := strconv.Atoi(text)
		if err != nil || n < 0 {
			return fieldError(f, " must be a non-negative index or top, got ", strconv.Quote(text))
		}
		s.Target = n
	case FieldOutput:
		s.Output = text
	case FieldLogits, FieldAbs:
		v, err := strconv.ParseBool(text)
		if err != nil {
			return fieldError(f, " must be true or false, got ", strconv.Quote(text))
		}
		if f == FieldLogits {
			s.Logits = v
		} else {
			s.Absolute = v
		}
	case FieldBaseline:
		b, err := ParseBaseline(text)
		if err != nil {
			return err
		}
		s.Baseline = b
	case FieldReference:
		s.Reference = &Dataset{Name: text}
	case FieldSteps:
		if text == "auto" {
			s.Steps = 0
			return nil
		}
		n, err := strconv.Atoi(text)
		if err != nil || n < 1 || n > gradattr.MaxPointsLimit {
			return fieldError(f, fmt.Sprintf(" must be auto or a number from 1 to %d, got %q", gradattr.MaxPointsLimit, text))
		}
		s.Steps = n
	case FieldRule:
		r, err := gradattr.ParseRule(text)
		if err != nil {
			return fieldError(f, " must be trapezoid, left, right, midpoint or gauss-legendre, got ", strconv.Quote(text))
		}
		s.Rule = r
	case FieldTolerance:
		v, err := strconv.ParseFloat(text, 64)
		if err != nil || math.IsNaN(v) || v <= 0 || v >= 1 {
			return fieldError(f, " must be in (0, 1), got ", text)
		}
		s.Tolerance = v
	case FieldSamples:
		n, err := strconv.Atoi(text)
		if err != nil || n < 1 || n > gradattr.MaxSamplesLimit {
			return fieldError(f, fmt.Sprintf(" must be from 1 to %d, got %s", gradattr.MaxSamplesLimit, text))
		}
		s.Samples = n
	case FieldNoise:
		v, err := strconv.ParseFloat(text, 64)
		if err != nil || math.IsNaN(v) || math.IsInf(v, 0) || v <= 0 {
			return fieldError(f, " must be a positive number, got ", text)
		}
		s.Noise = v
	case FieldSeed:
		v, err := strconv.ParseUint(text, 10, 64)
		if err != nil {
			return fieldError(f, " must be a non-negative integer, got ", strconv.Quote(text))
		}
		s.Seed = v
	case FieldVariant:
		v, err := gradattr.ParseVariant(text)
		if err != nil {
			return fieldError(f, " must be mean, squared or variance, got ", strconv.Quote(text))
		}
		s.Variant = v
	default:
		return fieldError(f, " is not a setting")
	}
	return nil
}

// Check judges the settings together: a method parameter given (by Set)
// for a method that does not read it, fewer integration points than the
// rule needs, a reference set given with integrated gradients against a
// baseline other than the mean. Errors are *FieldError.
func (s *Settings) Check() error {
	if _, err := gradattr.ParseMethod(string(s.Method)); err != nil {
		return fieldError(FieldMethod, " must be one of ", gradattr.MethodNames(), ", got ", strconv.Quote(string(s.Method)))
	}
	for _, f := range methodFields {
		if !s.given[f] || s.Method.Reads(gradattr.Param(f)) {
			continue
		}
		if f == FieldSeed && s.Method.Reads(gradattr.ParamBaseline) && s.Baseline.Kind == gradattr.BaselineUniform {
			continue // the seed of the uniform baseline's noise
		}
		var readers []string
		for _, m := range gradattr.Methods() {
			if m.Reads(gradattr.Param(f)) {
				readers = append(readers, m.String())
			}
		}
		return fieldError(f, " applies to ", FieldMethod, " ", strings.Join(readers, " and "), " only, not ", s.Method)
	}
	if min := s.Rule.MinPoints(); s.Method.Reads(gradattr.ParamSteps) && s.Steps > 0 && s.Steps < min {
		return fieldError(FieldSteps, fmt.Sprintf(" must be auto or at least %d with the %s rule, got %d", min, s.Rule, s.Steps))
	}
	if s.Reference != nil && s.Method.Reads(gradattr.ParamBaseline) && !s.Baseline.fromReference() {
		return fieldError(FieldReference, " with ", FieldMethod, " ", s.Method, " is the set ", FieldBaseline, " mean or median reads; give ", FieldBaseline, " mean or median too")
	}
	return nil
}

// NeedsReference reports whether the settings read a reference set:
// expected gradients, and a method with a baseline against the mean or
// median.
func (s *Settings) NeedsReference() bool {
	return (s.Method.Reads(gradattr.ParamReference) && !s.Method.Reads(gradattr.ParamBaseline)) ||
		(s.Method.Reads(gradattr.ParamBaseline) && s.Baseline.fromReference())
}

// fromReference reports whether the baseline is computed from a reference
// set: the mean or the median.
func (b Baseline) fromReference() bool {
	return b.Kind == gradattr.BaselineMean || b.Kind == gradattr.BaselineMedian
}
