package fidelity

import (
	"context"
	"fmt"
	"math"
	"slices"

	"github.com/apportion/apportion/gradattr"
)

// Randomized returns the model with the weights of its depth last layers
// replaced by random draws (depth = 1: the output layer only), for depth
// from 1 to the number of layers: the cascade of Adebayo et al. 2018.
type Randomized func(depth int) (gradattr.Model, error)

// Step is the similarity of the attributions of the model with its last
// Depth layers randomized to those of the trained model.
type Step struct {
	// Depth is the number of layers randomized, from the output down.
	Depth int `json:"depth"`
	// Spearman is the rank correlation of the two attributions.
	Spearman float64 `json:"spearman"`
	// SSIM is the structural similarity of the two attribution maps, for
	// image-shaped inputs; NaN otherwise.
	SSIM float64 `json:"ssim"`
}

// Randomization runs the model-parameter randomization test (Adebayo,
// Gilmer, Muelly, Goodfellow, Hardt & Kim 2018, "Sanity checks for
// saliency maps", §3): it computes the attributions of each model of the
// cascade, layers randomized from the output layer down, and compares them
// with attr, the trained model's, by Spearman's rank correlation and, for
// inputs of shape (…, H, W) with H, W ≥ 7, by SSIM. An explanation that
// stays the same while the model is destroyed does not explain the model.
func Randomization(ctx context.Context, a Attributor, models Randomized, layers int, x []float64, shape []int, target int, attr []float64) ([]Step, error) {
	if err := checkVector("the attribution", attr, len(x)); err != nil {
		return nil, err
	}
	if layers < 1 {
		return nil, fmt.Errorf("%w: the model has no layers with weights to randomize", ErrInput)
	}
	steps := make([]Step, 0, layers)
	for d := 1; d <= layers; d++ {
		var m gradattr.Model
		err := safe("randomizing the model", func() (err error) {
			m, err = models(d)
			return err
		})
		if err != nil {
			return nil, err
		}
		ar, err := attribute(ctx, a, m, x, target)
		if err != nil {
			return nil, fmt.Errorf("%d randomized layers: %w", d, err)
		}
		st := Step{Depth: d, Spearman: Spearman(attr, ar), SSIM: math.NaN()}
		if h, w, ok := imageSize(shape); ok {
			st.SSIM = MapSSIM(attr, ar, h, w)
		}
		steps = append(steps, st)
	}
	return steps, nil
}

// imageSize returns the last two axes of shape when they are large enough
// for SSIM's window.
func imageSize(shape []int) (h, w int, ok bool) {
	if len(shape) < 2 {
		return 0, 0, false
	}
	h, w = shape[len(shape)-2], shape[len(shape)-1]
	return h, w, h >= ssimWindow && w >= ssimWindow
}

// Spearman returns Spearman's rank correlation of a and b: Pearson's
// correlation of their ranks, ties given their mean rank (Spearman 1904).
// It is 0 when either has all values equal: there is no order to keep.
func Spearman(a, b []float64) float64 {
	return pearson(ranks(a), ranks(b))
}

// ranks returns the rank of each value, from 1, ties sharing their mean
// rank.
func ranks(v []float64) []float64 {
	idx := make([]int, len(v))
	for i := range idx {
		idx[i] = i
	}
	slices.SortStableFunc(idx, func(i, j int) int {
		switch {
		case v[i] < v[j]:
			return -1
		case v[i] > v[j]:
			return 1
		}
		return 0
	})
	r := make([]float64, len(v))
	for lo := 0; lo < len(idx); {
		hi := lo + 1
		for hi < len(idx) && v[idx[hi]] == v[idx[lo]] {
			hi++
		}
		mean := float64(lo+hi+1) / 2 // ranks lo+1..hi
		for _, i := range idx[lo:hi] {
			r[i] = mean
		}
		lo = hi
	}
	return r
}

// pearson returns Pearson's correlation of a and b, 0 when either is
// constant.
func pearson(a, b []float64) float64 {
	n := float64(len(a))
	if n == 0 {
		return math.NaN()
	}
	ma, mb := 0.0, 0.0
	for i := range a {
		ma += a[i]
		mb += b[i]
	}
	ma, mb = ma/n, mb/n
	var sab, saa, sbb float64
	for i := range a {
		da, db := a[i]-ma, b[i]-mb
		sab += da * db
		saa += da * da
		sbb += db * db
	}
	if saa == 0 || sbb == 0 {
		return 0
	}
	return sab / math.Sqrt(saa*sbb)
}

// The window of SSIM: 11×11 Gaussian weights of σ = 1.5 pixels (Wang et
// al. 2004, §III.C) would not fit a 32×32 map many times; 7×7 with the
// same σ is common practice for small images.
const (
	ssimWindow = 7
	ssimSigma  = 1.5
)

// MapSSIM compares two attribution maps of h×w pixels (summed over any
// leading axes, such as channels) by SSIM after taking absolute values and
// dividing each map by its largest value, so that both lie in [0, 1]
// (the normalisation of Adebayo et al. 2018, §3). It is 1 for maps equal
// up to a positive factor; NaN when a map is all zero.
func MapSSIM(a, b []float64, h, w int) float64 {
	pa, pb := absMap(a, h, w), absMap(b, h, w)
	if pa == nil || pb == nil {
		return math.NaN()
	}
	return SSIM(pa, pb, h, w, 1)
}

// absMap sums v over its leading axes into h×w pixels, takes absolute
// values and divides by the largest; nil when it is all zero.
func absMap(v []float64, h, w int) []float64 {
	p := make([]float64, h*w)
	for i, x := range v {
		p[i%(h*w)] += x
	}
	top := 0.0
	for i := range p {
		p[i] = math.Abs(p[i])
		top = math.Max(top, p[i])
	}
	if top == 0 {
		return nil
	}
	for i := range p {
		p[i] /= top
	}
	return p
}

// SSIM returns the mean structural similarity of two h×w images whose
// values span dynamic range L (Wang, Bovik, Sheikh & Simoncelli 2004,
// eq. 13 with the local statistics of eqs. 14–16 under Gaussian weights,
// K1 = 0.01, K2 = 0.03), averaged over the windows that fit inside the
// image.
func SSIM(a, b []float64, h, w int, L float64) float64 {
	c1, c2 := (0.01*L)*(0.01*L), (0.03*L)*(0.03*L)
	r := ssimWindow / 2
	g := make([]float64, ssimWindow*ssimWindow)
	total := 0.0
	for dy := -r; dy <= r; dy++ {
		for dx := -r; dx <= r; dx++ {
			v := math.Exp(-float64(dx*dx+dy*dy) / (2 * ssimSigma * ssimSigma))
			g[(dy+r)*ssimWindow+dx+r] = v
			total += v
		}
	}
	sum, count := 0.0, 0
	for y := r; y < h-r; y++ {
		for x := r; x < w-r; x++ {
			var ma, mb, saa, sbb, sab float64
			for dy := -r; dy <= r; dy++ {
				for dx := -r; dx <= r; dx++ {
					k := g[(dy+r)*ssimWindow+dx+r] / total
					va, vb := a[(y+dy)*w+x+dx], b[(y+dy)*w+x+dx]
					ma += k * va
					mb += k * vb
					saa += k * va * va
					sbb += k * vb * vb
					sab += k * va * vb
				}
			}
			saa -= ma * ma
			sbb -= mb * mb
			sab -= ma * mb
			sum += ((2*ma*mb + c1) * (2*sab + c2)) / ((ma*ma + mb*mb + c1) * (saa + sbb + c2))
			count++
		}
	}
	return sum / float64(count)
}
