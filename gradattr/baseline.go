package gradattr

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
)

// BaselineKind names how a Baseline is built.
type BaselineKind string

// The baseline kinds. The empty kind is BaselineZero.
const (
	// BaselineZero is x′ = 0, the usual choice of Sundararajan et al. 2017
	// ("the black image").
	BaselineZero BaselineKind = "zero"
	// BaselineConstant is x′_i = Value for every feature.
	BaselineConstant BaselineKind = "constant"
	// BaselineMean is the per-feature mean of Reference.
	BaselineMean BaselineKind = "mean"
	// BaselineMedian is the per-feature median of Reference (the mean of
	// the two middle values for an even count).
	BaselineMedian BaselineKind = "median"
	// BaselineBlur is the input blurred by a Gaussian of Sigma pixels over
	// its last two axes (see Blur); Sturmfels, Lundberg & Lee 2020,
	// "Visualizing the impact of feature attribution baselines".
	BaselineBlur BaselineKind = "blur"
	// BaselineUniform is noise drawn uniformly in [Lo, Hi) from a PCG
	// generator seeded by (Seed, 1), feature by feature (Sturmfels et al.
	// 2020, "uniform baseline").
	BaselineUniform BaselineKind = "uniform"
	// BaselineValues is the explicit tensor Values.
	BaselineValues BaselineKind = "values"
)

// Baseline describes one reference point x′ of integrated gradients. Its
// zero value is the zero baseline. Only the fields of its Kind are read.
// Reference and Values are not part of the JSON encoding (Settings records
// the kind and parameters, not the data).
type Baseline struct {
	// Kind selects the construction; "" means BaselineZero.
	Kind BaselineKind `json:"kind"`
	// Value is the constant of BaselineConstant.
	Value float64 `json:"value,omitempty"`
	// Sigma is the standard deviation, in pixels, of BaselineBlur (> 0).
	Sigma float64 `json:"sigma,omitempty"`
	// Lo and Hi bound BaselineUniform (Lo < Hi).
	Lo float64 `json:"lo,omitempty"`
	Hi float64 `json:"hi,omitempty"`
	// Seed seeds BaselineUniform.
	Seed uint64 `json:"seed,omitempty"`
	// Reference is the reference set of BaselineMean and BaselineMedian,
	// one sample per row.
	Reference [][]float64 `json:"-"`
	// Values is the tensor of BaselineValues.
	Values []float64 `json:"-"`
	// Source names where Reference or Values came from (a file name, a
	// hash), for the record; the methods do not read it.
	Source string `json:"source,omitempty"`
}

// Build returns the baseline for sample x of the given shape, as a fresh
// slice. Errors wrap ErrInput (bad data) or ErrOptions (bad parameters).
func (b Baseline) Build(x []float64, shape []int) ([]float64, error) {
	size, err := shapeSize(shape)
	if err != nil {
		return nil, fmt.Errorf("%w: %w", ErrInput, err)
	}
	if len(x) != size {
		return nil, fmt.Errorf("%w: input has %d values, shape %v needs %d", ErrInput, len(x), shape, size)
	}
	out := make([]float64, size)
	switch b.Kind {
	case "", BaselineZero:
	case BaselineConstant:
		if math.IsNaN(b.Value) || math.IsInf(b.Value, 0) {
			return nil, fmt.Errorf("%w: constant baseline %v, want a finite number", ErrOptions, b.Value)
		}
		for i := range out {
			out[i] = b.Value
		}
	case BaselineMean, BaselineMedian:
		if len(b.Reference) == 0 {
			return nil, fmt.Errorf("%w: %s baseline needs a reference set, got none", ErrInput, b.Kind)
		}
		for k, row := range b.Reference {
			if err := checkSample(fmt.Sprintf("reference sample %d", k), row, shape, size); err != nil {
				return nil, err
			}
		}
		if b.Kind == BaselineMean {
			for _, row := range b.Reference {
				for i, v := range row {
					out[i] += v
				}
			}
			for i := range out {
				out[i] /= float64(len(b.Reference))
			}
		} else {
			col := make([]float64, len(b.Reference))
			for i := range out {
				for k, row := range b.Reference {
					col[k] = row[i]
				}
				out[i] = median(col)
			}
		}
	case BaselineBlur:
		return Blur(x, shape, b.Sigma)
	case BaselineUniform:
		if !(b.Lo < b.Hi) || math.IsInf(b.Lo, 0) || math.IsInf(b.Hi, 0) {
			return nil, fmt.Errorf("%w: uniform baseline [%v, %v), want finite lo < hi", ErrOptions, b.Lo, b.Hi)
		}
		rng := rand.New(rand.NewPCG(b.Seed, 1))
		for i := range out {
			out[i] = b.Lo + (b.Hi-b.Lo)*rng.Float64()
		}
	case BaselineValues:
		if err := checkSample("baseline", b.Values, shape, size); err != nil {
			return nil, err
		}
		copy(out, b.Values)
	default:
		return nil, fmt.Errorf("%w: baseline kind %q, want zero, constant, mean, median, blur, uniform or values", ErrOptions, b.Kind)
	}
	return out, nil
}

// median sorts v in place and returns its median.
func median(v []float64) float64 {
	slices.Sort(v)
	n := len(v)
	if n%2 == 1 {
		return v[n/2]
	}
	return (v[n/2-1] + v[n/2]) / 2
}

// describe returns the specs for Settings: kinds filled in, data dropped.
func describe(specs []Baseline) []Baseline {
	d := make([]Baseline, len(specs))
	for i, s := range specs {
		if s.Kind == "" {
			s.Kind = BaselineZero
		}
		s.Reference, s.Values = nil, nil
		d[i] = s
	}
	return d
}

// Blur returns x blurred by a Gaussian of standard deviation sigma pixels
// over the last two axes of shape (height, width); leading axes (channels,
// batch) are blurred independently. The kernel is separable: the sampled
// Gaussian
//
//	k_j = exp(−j² / (2σ²)) / Σ_{|l|≤r} exp(−l² / (2σ²)),  |j| ≤ r = ⌈3σ⌉
//
// (truncated at three standard deviations, common practice) is applied
// along the rows, then along the columns. Beyond the edges the image is
// reflected about the pixel edge, "d c b a | a b c d | d c b a" (half-sample
// symmetric), so a constant image stays constant.
func Blur(x []float64, shape []int, sigma float64) ([]float64, error) {
	if len(shape) < 2 {
		return nil, fmt.Errorf("%w: blur needs an input of at least two axes (height, width), got shape %v", ErrInput, shape)
	}
	size, err := shapeSize(shape)
	if err != nil {
		return nil, fmt.Errorf("%w: %w", ErrInput, err)
	}
	if len(x) != size {
		return nil, fmt.Errorf("%w: input has %d values, shape %v needs %d", ErrInput, len(x), shape, size)
	}
	if !(sigma > 0) || sigma > 1e4 {
		return nil, fmt.Errorf("%w: blur sigma %v pixels, want 0 < σ ≤ 10000", ErrOptions, sigma)
	}
	r := int(math.Ceil(3 * sigma))
	k := make([]float64, 2*r+1)
	total := 0.0
	for j := -r; j <= r; j++ {
		k[j+r] = math.Exp(-float64(j*j) / (2 * sigma * sigma))
		total += k[j+r]
	}
	for j := range k {
		k[j] /= total
	}
	h, w := shape[len(shape)-2], shape[len(shape)-1]
	tmp := make([]float64, size)
	out := make([]float64, size)
	for p := 0; p < size; p += h * w {
		src, mid, dst := x[p:p+h*w], tmp[p:p+h*w], out[p:p+h*w]
		for row := 0; row < h; row++ {
			for col := 0; col < w; col++ {
				s := 0.0
				for j := -r; j <= r; j++ {
					s += k[j+r] * src[row*w+mirror(col+j, w)]
				}
				mid[row*w+col] = s
			}
		}
		for row := 0; row < h; row++ {
			for col := 0; col < w; col++ {
				s := 0.0
				for j := -r; j <= r; j++ {
					s += k[j+r] * mid[mirror(row+j, h)*w+col]
				}
				dst[row*w+col] = s
			}
		}
	}
	return out, nil
}

// mirror folds index i into [0, n) by half-sample symmetric reflection.
func mirror(i, n int) int {
	period := 2 * n
	i %= period
	if i < 0 {
		i += period
	}
	if i >= n {
		i = period - 1 - i
	}
	return i
}
