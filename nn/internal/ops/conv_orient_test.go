package ops

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"math/rand"
	"testing"

	"github.com/stretchr/testify/require"
)

// The transposed orientation of the packed convolution, kept as a
// measurement: M = output positions (over the padded width, as in
// sconvGrid), N = output channels, so the weights are the packed B panels
// and the image is packed into sgemmMR-position strips of A; the kernel
// writes positions × channels tiles into a scratch matrix that is then
// transposed into NCHW with the bias added. BenchmarkConvOrientation
// compares it with the production orientation (sconvSample) on the
// bench/models shapes.

// convTransposedSample computes one sample of y = W·im2col(xp) + b in the
// transposed orientation. bp holds Wᵀ packed by sgemmPackPanelB; a is
// scratch of k·sgemmMR (+2) elements, cs of pq6·mpad.
func convTransposedSample(pl *sconvPlan, xp, bp []float32, m int, b, y, a, cs []float32) {
	g := &pl.g
	k := g.k()
	mpad := (m + sgemmNR - 1) / sgemmNR * sgemmNR
	pq6 := (g.oh*g.wp + sgemmMR - 1) / sgemmMR * sgemmMR
	for q0 := 0; q0 < pq6; q0 += sgemmMR {
		src := xp[q0:]
		for p, o := range pl.off {
			d := a[p*sgemmMR : p*sgemmMR+sgemmMR]
			s := src[o : o+sgemmMR]
			d[0], d[1], d[2], d[3], d[4], d[5] = s[0], s[1], s[2], s[3], s[4], s[5]
		}
		for jn := 0; jn < mpad; jn += sgemmNR {
			f32.Gemm6x16(k, &a[0], &bp[jn*k], &cs[q0*mpad+jn], mpad, 1, 0)
		}
	}
	p := g.oh * g.ow
	for mi := 0; mi < m; mi++ {
		var bv float32
		if b != nil {
			bv = b[mi]
		}
		dst := y[mi*p : (mi+1)*p]
		for oy := 0; oy < g.oh; oy++ {
			for ox := 0; ox < g.ow; ox++ {
				dst[oy*g.ow+ox] = cs[(oy*g.wp+ox)*mpad+mi] + bv
			}
		}
	}
}

// convOrientSetup builds one cnn-m-like sample: padded input, both packed
// weight layouts and the scratch of both orientations.
type convOrientSetup struct {
	pl                sconvPlan
	xp, wp, bpk, b    []float32
	strip, cs, a, cs2 []float32
	y1, y2            []float32
	m                 int
	tile              sconvTile
	x, w              []float64
	rc                convRouteCase
}

func newConvOrientSetup(rng *rand.Rand, c, m, h int) *convOrientSetup {
	s := &convOrientSetup{m: m}
	s.rc = convRouteCase{n: 1, c: c, h: h, w: h, m: m, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1}, sh: 1, sw: 1, dh: 1, dw: 1, group: 1, bias: true}
	g := sconvGeom{c: c, hp: h + 2, wp: h + 2, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: h, ow: h}
	s.pl.init(g)
	// Both orientations run over the padded width here, so they read the
	// same buffer; the production plan may pick sconvRows instead.
	s.pl.mode = sconvGrid
	k := g.k()
	s.x = randomInput(rng, c*h*h)
	s.w = randomInput(rng, m*k)
	x32, w32 := convTo32(s.x), convTo32(s.w)
	s.x, s.w = convTo64(x32), convTo64(w32)
	s.b = make([]float32, (m+sgemmMR-1)/sgemmMR*sgemmMR) // padded as sconvSample expects
	copy(s.b, convTo32(randomInput(rng, m)))
	s.xp = make([]float32, s.pl.padLen()+sgemmMR)
	sconvPad(x32, c, h, h, 1, 1, 1, 1, s.xp)
	s.wp = make([]float32, sconvPackedLen(m, k))
	sconvPackWeights(w32, m, k, s.wp)
	mpad := (m + sgemmNR - 1) / sgemmNR * sgemmNR
	s.bpk = make([]float32, mpad*k)
	sgemmPackPanelB(true, w32, k, 0, k, 0, m, s.bpk)
	s.strip = make([]float32, k*sgemmNR)
	s.cs = make([]float32, s.pl.scratchLen(m))
	s.a = make([]float32, k*sgemmMR+2)
	pq6 := (g.oh*g.wp + sgemmMR - 1) / sgemmMR * sgemmMR
	s.cs2 = make([]float32, pq6*mpad)
	s.y1 = make([]float32, m*h*h)
	s.y2 = make([]float32, m*h*h)
	return s
}

func TestConvTransposedOrientation(t *testing.T) {
	// The measured alternative computes the same convolution: both
	// orientations against the ONNX Conv definition evaluated by loops
	// (common practice), within the float32 dot-product bound (Higham 2002,
	// eq. 3.5; from memory).
	rng := rand.New(rand.NewSource(45))
	s := newConvOrientSetup(rng, 5, 20, 11)
	sconvSample(&s.pl, s.xp, s.wp, s.m, s.b, s.y1, s.strip, s.cs, &s.tile)
	convTransposedSample(&s.pl, s.xp, s.bpk, s.m, s.b, s.y2, s.a, s.cs2)
	want, mag := convNaiveForward(s.rc, s.x, s.w, convTo64(s.b[:s.m]))
	convRequireBound(t, "channels × positions", convTo64(s.y1), want, mag, s.rc.c*9, 0x1p-24)
	convRequireBound(t, "positions × channels", convTo64(s.y2), want, mag, s.rc.c*9, 0x1p-24)
	require.Len(t, s.y2, len(want))
}

// BenchmarkConvOrientation times one sample of the forward convolution in
// the production orientation (M = channels, "channels") and the transposed
// one (M = positions, "positions") on the cnn-m shapes, both over the
// padded width, and reports GFLOP/s = 2·MACs / time.
func BenchmarkConvOrientation(b *testing.B) {
	if !f32.Asm() {
		b.Skip("the kernels run in assembly only with AVX2 and FMA")
	}
	rng := rand.New(rand.NewSource(4))
	for _, sh := range convBenchShapes {
		s := newConvOrientSetup(rng, sh.c, sh.m, sh.h)
		flops := 2 * float64(sh.m*sh.c*9*sh.h*sh.h)
		b.Run(sh.name+"/channels", func(b *testing.B) {
			for i := 0; i < b.N; i++ {
				sconvSample(&s.pl, s.xp, s.wp, s.m, s.b, s.y1, s.strip, s.cs, &s.tile)
			}
			b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		})
		b.Run(sh.name+"/positions", func(b *testing.B) {
			for i := 0; i < b.N; i++ {
				convTransposedSample(&s.pl, s.xp, s.bpk, s.m, s.b, s.y2, s.a, s.cs2)
			}
			b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		})
	}
}
