package gradattr

import (
	"context"
	"fmt"
)

// DefaultWindow is the side of the default occlusion window,
// DefaultWindow × DefaultWindow pixels; the default stride is half the
// window's shorter side (see OcclusionOptions).
const DefaultWindow = 4

// OcclusionOptions configures Occlusion. The zero value means: one zero
// baseline; for images a 4×4 window moved by 2 pixels; batches of
// DefaultForwardBatch rows.
type OcclusionOptions struct {
	// Baselines are what an occluded element is set to; nil means one
	// zero baseline. With several, the output with a region occluded is
	// the mean over them.
	Baselines []Baseline
	// Window is the occlusion window, [height, width] in pixels of the
	// last two axes; the zero value means DefaultWindow × DefaultWindow.
	Window [2]int
	// Stride is the window's step along both axes; 0 means half the
	// window's shorter side (at least 1).
	Stride int
	// Groups, when set, are occluded one at a time instead of windows or
	// features; they must partition the features.
	Groups []Group
	// BatchSize is the number of rows per model call; 0 means
	// DefaultForwardBatch.
	BatchSize int
}

// window returns the window and stride with defaults filled in.
func (o OcclusionOptions) window() (h, w, stride int) {
	h, w = o.Window[0], o.Window[1]
	if h == 0 && w == 0 {
		h, w = DefaultWindow, DefaultWindow
	}
	stride = o.Stride
	if stride == 0 {
		stride = max(1, min(h, w)/2)
	}
	return h, w, stride
}

// Occlusion attributes output target of m at x by occlusion (Zeiler &
// Fergus 2014, §4.2): the drop of the output when part of the input is
// replaced by the baseline,
//
//	Δ(R) = f(x) − (1/B) Σ_b f(x with region R taken from x′_b)
//
// over the B baselines. What a region is depends on the sample:
//
//   - with Groups, each group is a region, and each of its features is
//     attributed the group's Δ (Result.Groups holds the Δ per group);
//   - a sample of one axis (tabular): each feature is a region;
//   - a sample of two axes or more (an image, channels leading): windows
//     of Window pixels over the last two axes, at every Stride-th row and
//     column where the window fits, in every channel. An element is
//     attributed the mean of Δ over the windows that cover it; elements
//     no window covers get 0.
//
// Completeness, Σ a_i against f(x) − (1/B) Σ_b f(x′_b), is reported but
// not judged: occlusion does not promise it. Each region costs B forward
// rows, and the baselines B more.
func Occlusion(ctx context.Context, m Model, x []float64, target int, opt OcclusionOptions) (*Result, error) {
	wh, ww, stride := opt.window()
	if wh < 1 || ww < 1 || stride < 1 {
		return nil, fmt.Errorf("%w: occlusion window %d×%d with stride %d, want a window of at least 1×1 and a stride ≥ 1", ErrOptions, wh, ww, opt.Stride)
	}
	e, err := newEngine(ctx, m, x, target, forwardBatch(opt.BatchSize))
	if err != nil {
		return nil, err
	}
	bg, specs, err := e.baselines(opt.Baselines)
	if err != nil {
		return nil, err
	}
	s := Settings{Method: MethodOcclusion, BatchSize: e.batch, Baselines: describe(specs), Window: []int{wh, ww}, Stride: stride}
	var attr []float64
	var groups *GroupedResult
	base := []float64(nil)
	if opt.Groups != nil || len(e.shape) < 2 {
		p, err := newPlayers(e.size, opt.Groups)
		if err != nil {
			return nil, err
		}
		if err := e.checkRows("occlusion", (p.n()+1)*len(bg)); err != nil {
			return nil, err
		}
		if base, err = e.meanOutputs(bg); err != nil {
			return nil, err
		}
		// Region q is coalition q: every player but q.
		vals, err := e.coalitionValues(p, bg, p.n(), func(q int, on []bool) {
			for i := range on {
				on[i] = i != q
			}
		})
		if err != nil {
			return nil, err
		}
		drop := make([]float64, p.n())
		for q, v := range vals {
			drop[q] = e.outputs[e.target] - v
		}
		attr = p.paint(drop, e.size)
		groups = p.grouped(drop, nil, nil)
		if opt.Groups != nil {
			s.Groups = len(opt.Groups)
		}
	} else {
		h, w := e.shape[len(e.shape)-2], e.shape[len(e.shape)-1]
		if wh > h || ww > w {
			return nil, fmt.Errorf("%w: occlusion window %d×%d does not fit the sample's %d×%d pixels (height × width)", ErrOptions, wh, ww, h, w)
		}
		rows, cols := (h-wh)/stride+1, (w-ww)/stride+1
		windows := rows * cols
		if err := e.checkRows("occlusion", (windows+1)*len(bg)); err != nil {
			return nil, err
		}
		if base, err = e.meanOutputs(bg); err != nil {
			return nil, err
		}
		planes := e.size / (h * w)
		// each calls f(i) for every element of window c.
		each := func(c int, f func(i int)) {
			y0, x0 := c/cols*stride, c%cols*stride
			for pl := 0; pl < planes; pl++ {
				for y := y0; y < y0+wh; y++ {
					for xx := x0; xx < x0+ww; xx++ {
						f(pl*h*w + y*w + xx)
					}
				}
			}
		}
		k := len(bg)
		occluded := make([]float64, windows)
		fill := func(i int, dst []float64) {
			copy(dst, x)
			b := bg[i%k]
			each(i/k, func(j int) { dst[j] = b[j] })
		}
		use := func(i int, out []float64) { occluded[i/k] += out[e.target] }
		if err := e.forward(windows*k, fill, use); err != nil {
			return nil, err
		}
		sum := make([]float64, e.size)
		count := make([]int, e.size)
		for c := range occluded {
			drop := e.outputs[e.target] - occluded[c]/float64(k)
			each(c, func(j int) {
				sum[j] += drop
				count[j]++
			})
		}
		attr = sum
		for j, n := range count {
			if n > 0 {
				attr[j] /= float64(n)
			}
		}
	}
	r := e.result(attr, s)
	r.BaselineOutput = base[e.target]
	r.BaselineOutputs = base
	r.Completeness = completeness(attr, r.Output, r.BaselineOutput, 0, false)
	r.Groups = groups
	return r, nil
}
