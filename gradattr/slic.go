package gradattr

import (
	"fmt"
	"math"
)

// SLIC settings.
const (
	// DefaultCompactness is SLIC's m, the weight of space against colour
	// in CIELAB units (Achanta et al. 2012, §4: m in [1, 40]; 10 is the
	// common choice, common practice).
	DefaultCompactness = 10
	// slicIterations is the number of k-means iterations; Achanta et al.
	// 2012 (§4.2) find 10 enough for most images.
	slicIterations = 10
)

// Superpixels segments an image into about n superpixels by SLIC (Achanta,
// Shaji, Smith, Lucchi, Fua & Süsstrunk 2012, "SLIC superpixels compared to
// state-of-the-art superpixel methods", Algorithm 1). The image is x of the
// given shape: its last two axes are height and width, the product of the
// others its channels. It returns the segment of each pixel (row-major over
// height × width), numbered from 0 in the order their first pixels appear,
// and the number of segments.
//
// Each pixel is a point in colour and space. One channel is grey, rescaled
// to L = 100·(v − min)/(max − min) over the image; three are taken as sRGB
// after the same rescale to [0, 1] and converted to CIELAB (D65); other
// counts are each rescaled like grey. Cluster centres start at the middles
// of a grid of about n cells of about S = √(HW/n) pixels a side, moved to
// the lowest colour gradient of their 3×3 neighbourhood (§3.1); each pixel
// joins the nearest centre within 2S×2S, by
//
//	D = √(d_c² + (d_s / S)² m²)
//
// (d_c the colour distance, d_s the distance in pixels, m = compactness,
// eq. 3), and the centres move to the mean of their pixels, 10 times.
// Connectivity is enforced afterwards (§3.2): every 4-connected piece of a
// segment becomes a segment of its own, and pieces smaller than a quarter
// of the mean segment size join the segment next to their first pixel.
func Superpixels(x []float64, shape []int, n int, compactness float64) ([]int, int, error) {
	if len(shape) < 2 {
		return nil, 0, fmt.Errorf("%w: superpixels need an image, samples with at least two axes (height, width), got shape %v", ErrInput, shape)
	}
	size, err := shapeSize(shape)
	if err != nil {
		return nil, 0, fmt.Errorf("%w: %w", ErrInput, err)
	}
	if err := checkSample("image", x, shape, size); err != nil {
		return nil, 0, err
	}
	h, w := shape[len(shape)-2], shape[len(shape)-1]
	if n < 1 || n > h*w {
		return nil, 0, fmt.Errorf("%w: %d superpixels of a %d×%d image, want 1..%d", ErrOptions, n, h, w, h*w)
	}
	if !(compactness > 0) || math.IsInf(compactness, 0) {
		return nil, 0, fmt.Errorf("%w: compactness %v, want a finite value > 0", ErrOptions, compactness)
	}
	img := slicColours(x, h*w, size/(h*w))
	labels := slicCluster(img, h, w, n, compactness)
	count := enforceConnectivity(labels, h, w, n)
	return labels, count, nil
}

// SuperpixelGroups returns the superpixels of x (see Superpixels) as
// groups, "segment 0", "segment 1", …, each holding its pixels in every
// channel, and the label map.
func SuperpixelGroups(x []float64, shape []int, n int, compactness float64) ([]Group, []int, error) {
	labels, count, err := Superpixels(x, shape, n, compactness)
	if err != nil {
		return nil, nil, err
	}
	hw := len(labels)
	planes := len(x) / hw
	groups := make([]Group, count)
	for g := range groups {
		groups[g].Name = fmt.Sprintf("segment %d", g)
	}
	for pl := 0; pl < planes; pl++ {
		for p, l := range labels {
			groups[l].Indices = append(groups[l].Indices, pl*hw+p)
		}
	}
	return groups, labels, nil
}

// slicImage is an image as SLIC sees it: c colour values per pixel.
type slicImage struct {
	c   int
	pix []float64 // pixel p's colour is pix[p*c : (p+1)*c]
}

// slicColours converts the planes of x (channel-major) to per-pixel colour
// vectors: CIELAB for three channels, rescaled values otherwise.
func slicColours(x []float64, hw, planes int) slicImage {
	lo, hi := x[0], x[0]
	for _, v := range x {
		lo, hi = math.Min(lo, v), math.Max(hi, v)
	}
	unit := func(v float64) float64 {
		if hi == lo {
			return 0
		}
		return (v - lo) / (hi - lo)
	}
	if planes == 3 {
		img := slicImage{c: 3, pix: make([]float64, 3*hw)}
		for p := 0; p < hw; p++ {
			l, a, b := labFromSRGB(unit(x[p]), unit(x[hw+p]), unit(x[2*hw+p]))
			img.pix[3*p], img.pix[3*p+1], img.pix[3*p+2] = l, a, b
		}
		return img
	}
	img := slicImage{c: planes, pix: make([]float64, planes*hw)}
	for pl := 0; pl < planes; pl++ {
		for p := 0; p < hw; p++ {
			img.pix[p*planes+pl] = 100 * unit(x[pl*hw+p])
		}
	}
	return img
}

// labFromSRGB converts sRGB in [0, 1] to CIELAB under D65 (IEC 61966-2-1
// for the transfer curve and the matrix; CIE 15 for L*a*b*).
func labFromSRGB(r, g, b float64) (l, a, bb float64) {
	lin := func(c float64) float64 {
		if c <= 0.04045 {
			return c / 12.92
		}
		return math.Pow((c+0.055)/1.055, 2.4)
	}
	r, g, b = lin(r), lin(g), lin(b)
	x := (0.4124*r + 0.3576*g + 0.1805*b) / 0.95047
	y := 0.2126*r + 0.7152*g + 0.0722*b
	z := (0.0193*r + 0.1192*g + 0.9505*b) / 1.08883
	f := func(t float64) float64 {
		const d = 6.0 / 29
		if t > d*d*d {
			return math.Cbrt(t)
		}
		return t/(3*d*d) + 4.0/29
	}
	fx, fy, fz := f(x), f(y), f(z)
	return 116*fy - 16, 500 * (fx - fy), 200 * (fy - fz)
}

// slicCluster runs SLIC's k-means and returns a label per pixel.
func slicCluster(img slicImage, h, w, n int, m float64) []int {
	c := img.c
	colour := func(y, x int) []float64 { p := y*w + x; return img.pix[p*c : (p+1)*c] }
	dist2 := func(a, b []float64) float64 {
		s := 0.0
		for i := range a {
			d := a[i] - b[i]
			s += d * d
		}
		return s
	}
	// A grid of ny × nx ≈ n cells of about step × step pixels.
	step := math.Sqrt(float64(h*w) / float64(n))
	ny := min(h, max(1, int(math.Round(float64(h)/step))))
	nx := min(w, max(1, int(math.Round(float64(n)/float64(ny)))))
	// A centre is its colour, then y and x.
	k := ny * nx
	centres := make([][]float64, 0, k)
	gradient := func(y, x int) float64 {
		cl := func(v, hi int) int { return min(max(v, 0), hi-1) }
		return dist2(colour(y, cl(x+1, w)), colour(y, cl(x-1, w))) + dist2(colour(cl(y+1, h), x), colour(cl(y-1, h), x))
	}
	for j := 0; j < ny; j++ {
		for i := 0; i < nx; i++ {
			cy := int((float64(j) + 0.5) * float64(h) / float64(ny))
			cx := int((float64(i) + 0.5) * float64(w) / float64(nx))
			by, bx, best := cy, cx, math.Inf(1)
			for dy := -1; dy <= 1; dy++ {
				for dx := -1; dx <= 1; dx++ {
					y, x := cy+dy, cx+dx
					if y < 0 || y >= h || x < 0 || x >= w {
						continue
					}
					if g := gradient(y, x); g < best {
						by, bx, best = y, x, g
					}
				}
			}
			ctr := append(append([]float64(nil), colour(by, bx)...), float64(by), float64(bx))
			centres = append(centres, ctr)
		}
	}
	spatial := m * m / (step * step)
	reach := int(math.Ceil(math.Max(float64(h)/float64(ny), float64(w)/float64(nx))))
	labels := make([]int, h*w)
	best := make([]float64, h*w)
	sums := make([][]float64, k)
	for q := range sums {
		sums[q] = make([]float64, c+3) // colour, y, x, count
	}
	for it := 0; it < slicIterations; it++ {
		for p := range labels {
			labels[p], best[p] = -1, math.Inf(1)
		}
		for q, ctr := range centres {
			cy, cx := ctr[c], ctr[c+1]
			y0, y1 := max(0, int(cy)-reach), min(h-1, int(cy)+reach)
			x0, x1 := max(0, int(cx)-reach), min(w-1, int(cx)+reach)
			for y := y0; y <= y1; y++ {
				for x := x0; x <= x1; x++ {
					dy, dx := float64(y)-cy, float64(x)-cx
					d := dist2(colour(y, x), ctr[:c]) + (dy*dy+dx*dx)*spatial
					if p := y*w + x; d < best[p] {
						labels[p], best[p] = q, d
					}
				}
			}
		}
		// A pixel no centre reached (centres drift) joins the nearest.
		for p, l := range labels {
			if l >= 0 {
				continue
			}
			y, x := p/w, p%w
			for q, ctr := range centres {
				dy, dx := float64(y)-ctr[c], float64(x)-ctr[c+1]
				if d := dist2(colour(y, x), ctr[:c]) + (dy*dy+dx*dx)*spatial; d < best[p] {
					labels[p], best[p] = q, d
				}
			}
		}
		for _, s := range sums {
			clear(s)
		}
		for p, q := range labels {
			s := sums[q]
			for i, v := range colour(p/w, p%w) {
				s[i] += v
			}
			s[c] += float64(p / w)
			s[c+1] += float64(p % w)
			s[c+2]++
		}
		for q, s := range sums {
			if s[c+2] == 0 {
				continue // an empty cluster keeps its centre
			}
			for i := 0; i < c+2; i++ {
				centres[q][i] = s[i] / s[c+2]
			}
		}
	}
	return labels
}

// enforceConnectivity relabels labels in place so that every segment is
// 4-connected: each 4-connected piece of a cluster becomes a segment,
// numbered in scan order, except pieces of at most a quarter of the mean
// size HW/n, which join the segment of the 4-neighbour of their first
// pixel that is already numbered (the one above or to the left). It
// returns the number of segments.
func enforceConnectivity(labels []int, h, w, n int) int {
	small := h * w / n / 4
	out := make([]int, len(labels))
	for p := range out {
		out[p] = -1
	}
	next := 0
	var piece []int
	for start := range labels {
		if out[start] >= 0 {
			continue
		}
		adjacent := -1
		if y, x := start/w, start%w; x > 0 && out[start-1] >= 0 {
			adjacent = out[start-1]
		} else if y > 0 && out[start-w] >= 0 {
			adjacent = out[start-w]
		}
		old := labels[start]
		piece = append(piece[:0], start)
		out[start] = next
		for i := 0; i < len(piece); i++ {
			p := piece[i]
			y, x := p/w, p%w
			for _, q := range [4]int{p - 1, p + 1, p - w, p + w} {
				switch {
				case q == p-1 && x == 0, q == p+1 && x == w-1, q == p-w && y == 0, q == p+w && y == h-1:
					continue
				}
				if out[q] < 0 && labels[q] == old {
					out[q] = next
					piece = append(piece, q)
				}
			}
		}
		if len(piece) <= small && adjacent >= 0 {
			for _, p := range piece {
				out[p] = adjacent
			}
			continue
		}
		next++
	}
	copy(labels, out)
	return next
}
