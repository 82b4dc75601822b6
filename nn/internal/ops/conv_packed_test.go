package ops

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"fmt"
	"math"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// convRouteCase is one geometry for the route comparisons: an NCHW input
// and OIHW weights with ONNX-ordered pads.
type convRouteCase struct {
	n, c, h, w     int
	m, kh, kw      int
	pads           [4]int // top, left, bottom, right
	sh, sw, dh, dw int
	group          int
	bias           bool
}

func (rc convRouteCase) String() string {
	return fmt.Sprintf("n%d_c%d_%dx%d_m%d_k%dx%d_p%v_s%d%d_d%d%d_g%d_b%t",
		rc.n, rc.c, rc.h, rc.w, rc.m, rc.kh, rc.kw, rc.pads, rc.sh, rc.sw, rc.dh, rc.dw, rc.group, rc.bias)
}

func (rc convRouteCase) op() *convOp {
	return &convOp{rank: 2, pads: []int{rc.pads[0], rc.pads[1], rc.pads[2], rc.pads[3]},
		strides: []int{rc.sh, rc.sw}, dils: []int{rc.dh, rc.dw}, group: rc.group, bias: rc.bias,
		constW: true, constB: true, slot: new(convSlot)}
}

func (rc convRouteCase) out() (oh, ow int) {
	oh = (rc.h+rc.pads[0]+rc.pads[2]-(rc.kh-1)*rc.dh-1)/rc.sh + 1
	ow = (rc.w+rc.pads[1]+rc.pads[3]-(rc.kw-1)*rc.dw-1)/rc.sw + 1
	return oh, ow
}

// convRouteCases draws random geometries covering pads 0/1/2 (also
// asymmetric), dilations 1/2, kernels 1×1, 3×3, 5×5, 1×3 and 3×1,
// non-square images, batches 1 and 3, groups, with and without bias, and
// (forward only) strides 2.
func convRouteCases(rng *rand.Rand) []convRouteCase {
	kernels := [][2]int{{1, 1}, {3, 3}, {5, 5}, {1, 3}, {3, 1}}
	var cases []convRouteCase
	for _, k := range kernels {
		for _, d := range []int{1, 2} {
			for _, p := range []int{0, 1, 2} {
				rc := convRouteCase{n: 1 + 2*rng.Intn(2), kh: k[0], kw: k[1], dh: d, dw: d, sh: 1, sw: 1,
					group: 1, bias: rng.Intn(2) == 0}
				rc.pads = [4]int{p, p, p, p}
				if rng.Intn(3) == 0 {
					rc.pads = [4]int{p, rng.Intn(3), rng.Intn(3), p}
				}
				if rng.Intn(4) == 0 {
					rc.group = 2
				}
				rc.c = rc.group * (1 + rng.Intn(4))
				rc.m = rc.group * (1 + rng.Intn(9))
				rc.h = (k[0]-1)*d + 1 + rng.Intn(12)
				rc.w = (k[1]-1)*d + 1 + rng.Intn(40) // rows shorter and longer than a 16-column strip
				cases = append(cases, rc)
			}
		}
	}
	// Strided forward cases (the input gradient keeps col2im there).
	for i := 0; i < 4; i++ {
		rc := convRouteCase{n: 2, c: 3, h: 9 + i, w: 20 + 3*i, m: 5 + i, kh: 3, kw: 3, sh: 2, sw: 1 + i%2, dh: 1, dw: 1 + i/2,
			pads: [4]int{1, 0, 1, 2}, group: 1, bias: true}
		cases = append(cases, rc)
	}
	return cases
}

// convNaiveForward evaluates the ONNX Conv definition with seven nested
// loops in float64 (ONNX Conv operator doc, opset 11; common practice):
// y[n,m,oy,ox] = b[m] + Σ_{c,i,j} w[m,c,i,j]·x[n, g·Cg+c, oy·sh−pt+i·dh, ox·sw−pl+j·dw].
// It also returns Σ |terms| per output, the scale of the rounding bound.
func convNaiveForward(rc convRouteCase, x, w, b []float64) (y, mag []float64) {
	oh, ow := rc.out()
	cg, mg := rc.c/rc.group, rc.m/rc.group
	y = make([]float64, rc.n*rc.m*oh*ow)
	mag = make([]float64, len(y))
	for n := 0; n < rc.n; n++ {
		for m := 0; m < rc.m; m++ {
			g := m / mg
			for oy := 0; oy < oh; oy++ {
				for ox := 0; ox < ow; ox++ {
					var s, a float64
					if b != nil {
						s, a = b[m], math.Abs(b[m])
					}
					for c := 0; c < cg; c++ {
						for i := 0; i < rc.kh; i++ {
							for j := 0; j < rc.kw; j++ {
								iy, ix := oy*rc.sh-rc.pads[0]+i*rc.dh, ox*rc.sw-rc.pads[1]+j*rc.dw
								if iy < 0 || iy >= rc.h || ix < 0 || ix >= rc.w {
									continue
								}
								t := w[((m*cg+c)*rc.kh+i)*rc.kw+j] * x[((n*rc.c+g*cg+c)*rc.h+iy)*rc.w+ix]
								s += t
								a += math.Abs(t)
							}
						}
					}
					o := ((n*rc.m+m)*oh+oy)*ow + ox
					y[o], mag[o] = s, a
				}
			}
		}
	}
	return y, mag
}

// convNaiveInputGrad evaluates dx = ∂(Σ dy·y)/∂x from the same definition:
// each term w·x of y[n,m,oy,ox] adds w·dy[n,m,oy,ox] to dx at the input
// position it reads (the adjoint of the sum; common practice).
func convNaiveInputGrad(rc convRouteCase, w, dy []float64) (dx, mag []float64) {
	oh, ow := rc.out()
	cg, mg := rc.c/rc.group, rc.m/rc.group
	dx = make([]float64, rc.n*rc.c*rc.h*rc.w)
	mag = make([]float64, len(dx))
	for n := 0; n < rc.n; n++ {
		for m := 0; m < rc.m; m++ {
			g := m / mg
			for oy := 0; oy < oh; oy++ {
				for ox := 0; ox < ow; ox++ {
					d := dy[((n*rc.m+m)*oh+oy)*ow+ox]
					for c := 0; c < cg; c++ {
						for i := 0; i < rc.kh; i++ {
							for j := 0; j < rc.kw; j++ {
								iy, ix := oy*rc.sh-rc.pads[0]+i*rc.dh, ox*rc.sw-rc.pads[1]+j*rc.dw
								if iy < 0 || iy >= rc.h || ix < 0 || ix >= rc.w {
									continue
								}
								o := ((n*rc.c+g*cg+c)*rc.h+iy)*rc.w + ix
								t := w[((m*cg+c)*rc.kh+i)*rc.kw+j] * d
								dx[o] += t
								mag[o] += math.Abs(t)
							}
						}
					}
				}
			}
		}
	}
	return dx, mag
}

// randomInput returns n values uniform in [−1, 1).
func randomInput(rng *rand.Rand, n int) []float64 {
	v := make([]float64, n)
	for i := range v {
		v[i] = 2*rng.Float64() - 1
	}
	return v
}

// convTo32 rounds v to float32 (IEEE 754 round to nearest).
func convTo32(v []float64) []float32 {
	r := make([]float32, len(v))
	for i, x := range v {
		r[i] = float32(x)
	}
	return r
}

func convTo64(v []float32) []float64 {
	r := make([]float64, len(v))
	for i, x := range v {
		r[i] = float64(x)
	}
	return r
}

// convRequireBound checks |got − want| ≤ γ·mag elementwise, with γ =
// (k+2)·u for unit roundoff u: the forward error bound of a k-term sum of
// products plus one bias addition, |fl(Σ) − Σ| ≤ γ_k Σ|terms| (Higham 2002,
// "Accuracy and Stability of Numerical Algorithms", 2nd ed., §3.1, eq. 3.5;
// from memory), with one extra u of slack.
func convRequireBound(t *testing.T, what string, got, want, mag []float64, k int, u float64) {
	t.Helper()
	require.Len(t, got, len(want), what)
	gamma := float64(k+2) * u
	for i := range want {
		if d := math.Abs(got[i] - want[i]); d > gamma*mag[i]+1e-300 {
			t.Fatalf("%s: element %d: got %v, want %v (|diff| %g > bound %g)", what, i, got[i], want[i], d, gamma*mag[i])
		}
	}
}

func convDense32(shape []int, v []float32) *tensor.Dense {
	return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(v))
}

func convDense64(shape []int, v []float64) *tensor.Dense {
	return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(v))
}

// convOldForward32 runs the im2col + GEMM route on float32.
func convOldForward32(rc convRouteCase, x, w, b []float32) []float32 {
	op := rc.op()
	oh, ow := rc.out()
	g := convGeomOf(2, []int{rc.h, rc.w}, []int{rc.kh, rc.kw}, op.pads, op.strides, op.dils, []int{oh, ow})
	y := make([]float32, rc.n*rc.m*oh*ow)
	convForward(&g, rc.n, rc.c, rc.m, rc.group, x, w, b, y)
	return y
}

// convOldInputGrad32 runs the Wᵀ·dY + col2im route on float32.
func convOldInputGrad32(rc convRouteCase, w, dy []float32) []float32 {
	op := rc.op()
	oh, ow := rc.out()
	g := convGeomOf(2, []int{rc.h, rc.w}, []int{rc.kh, rc.kw}, op.pads, op.strides, op.dils, []int{oh, ow})
	dx := make([]float32, rc.n*rc.c*rc.h*rc.w)
	convBackward(&g, 0, rc.n, rc.c, rc.m, rc.group, nil, w, dy, dx)
	return dx
}

func TestConvRoutes(t *testing.T) {
	rng := rand.New(rand.NewSource(41))
	for _, rc := range convRouteCases(rng) {
		t.Run(rc.String(), func(t *testing.T) {
			oh, ow := rc.out()
			xs, ws, ys := []int{rc.n, rc.c, rc.h, rc.w}, []int{rc.m, rc.c / rc.group, rc.kh, rc.kw}, []int{rc.n, rc.m, oh, ow}
			x64 := randomInput(rng, rc.n*rc.c*rc.h*rc.w)
			w64 := randomInput(rng, rc.m*rc.c/rc.group*rc.kh*rc.kw)
			dy64 := randomInput(rng, rc.n*rc.m*oh*ow)
			var b64 []float64
			if rc.bias {
				b64 = randomInput(rng, rc.m)
			}
			// Inputs are float32 values, so float32 and float64 runs see the
			// same numbers and the float64 loops are the exact reference up
			// to float64 rounding.
			x32, w32, dy32, b32 := convTo32(x64), convTo32(w64), convTo32(dy64), convTo32(b64)
			x64, w64, dy64, b64 = convTo64(x32), convTo64(w32), convTo64(dy32), convTo64(b32)
			if !rc.bias {
				b32, b64 = nil, nil
			}
			kf := rc.c / rc.group * rc.kh * rc.kw
			kb := rc.m / rc.group * rc.kh * rc.kw
			wantY, magY := convNaiveForward(rc, x64, w64, b64)
			wantDX, magDX := convNaiveInputGrad(rc, w64, dy64)
			const u32, u64 = 0x1p-24, 0x1p-53 // IEEE 754 binary32 / binary64 unit roundoff

			vals32 := []G.Value{convDense32(xs, x32), convDense32(ws, w32)}
			vals64 := []G.Value{convDense64(xs, x64), convDense64(ws, w64)}
			if rc.bias {
				vals32 = append(vals32, convDense32([]int{rc.m}, b32))
				vals64 = append(vals64, convDense64([]int{rc.m}, b64))
			}
			op := rc.op()
			y32, err := op.Do(vals32...)
			require.NoError(t, err)
			require.Equal(t, tensor.Shape(ys), y32.Shape())
			convRequireBound(t, "forward float32 (packed route)", convTo64(y32.Data().([]float32)), wantY, magY, kf, u32)
			convRequireBound(t, "forward float32 (im2col route)", convTo64(convOldForward32(rc, x32, w32, b32)), wantY, magY, kf, u32)
			// Both float32 routes are within the bound of the exact sum,
			// hence within twice of each other.
			convRequireBound(t, "forward float32 packed vs im2col", convTo64(y32.Data().([]float32)),
				convTo64(convOldForward32(rc, x32, w32, b32)), magY, 2*kf+2, u32)
			y64, err := rc.op().Do(vals64...)
			require.NoError(t, err)
			convRequireBound(t, "forward float64", y64.Data().([]float64), wantY, magY, kf, u64)

			back := &convBackOp{convOp: *rc.op(), wrt: 0}
			dx32, err := back.Do(convDense32(xs, x32), convDense32(ws, w32), convDense32(ys, dy32))
			require.NoError(t, err)
			convRequireBound(t, "input gradient float32", convTo64(dx32.Data().([]float32)), wantDX, magDX, kb, u32)
			convRequireBound(t, "input gradient float32 (col2im route)", convTo64(convOldInputGrad32(rc, w32, dy32)), wantDX, magDX, kb, u32)
			convRequireBound(t, "input gradient float32 packed vs col2im", convTo64(dx32.Data().([]float32)),
				convTo64(convOldInputGrad32(rc, w32, dy32)), magDX, 2*kb+2, u32)
			back64 := &convBackOp{convOp: *rc.op(), wrt: 0}
			dx64, err := back64.Do(convDense64(xs, x64), convDense64(ws, w64), convDense64(ys, dy64))
			require.NoError(t, err)
			convRequireBound(t, "input gradient float64", dx64.Data().([]float64), wantDX, magDX, kb, u64)
		})
	}
}

func TestConvRoutesBatchInvariant(t *testing.T) {
	// Sample i of a batch of 7 is bit-identical to sample i run alone, on
	// both routes (the batching invariant documented on sgemm; the
	// reference is the same op on a batch of one).
	rng := rand.New(rand.NewSource(42))
	for _, rc := range []convRouteCase{
		{n: 7, c: 3, h: 32, w: 32, m: 16, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1}, sh: 1, sw: 1, dh: 1, dw: 1, group: 1, bias: true},
		{n: 7, c: 8, h: 14, w: 14, m: 16, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1}, sh: 1, sw: 1, dh: 1, dw: 1, group: 1, bias: true},
		{n: 7, c: 4, h: 9, w: 23, m: 6, kh: 5, kw: 3, pads: [4]int{2, 0, 1, 2}, sh: 1, sw: 1, dh: 2, dw: 1, group: 2},
		{n: 7, c: 3, h: 11, w: 19, m: 5, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1}, sh: 2, sw: 2, dh: 1, dw: 1, group: 1, bias: true},
	} {
		t.Run(rc.String(), func(t *testing.T) {
			oh, ow := rc.out()
			sx, sy := rc.c*rc.h*rc.w, rc.m*oh*ow
			x := convTo32(randomInput(rng, rc.n*sx))
			w := convTo32(randomInput(rng, rc.m*rc.c/rc.group*rc.kh*rc.kw))
			dy := convTo32(randomInput(rng, rc.n*sy))
			b := convTo32(randomInput(rng, rc.m))
			ws := []int{rc.m, rc.c / rc.group, rc.kh, rc.kw}
			run := func(n int, x, dy []float32) (y, dx []float32) {
				vals := []G.Value{convDense32([]int{n, rc.c, rc.h, rc.w}, x), convDense32(ws, w)}
				if rc.bias {
					vals = append(vals, convDense32([]int{rc.m}, b))
				}
				yv, err := rc.op().Do(vals...)
				require.NoError(t, err)
				back := &convBackOp{convOp: *rc.op(), wrt: 0}
				dxv, err := back.Do(vals[0], vals[1], convDense32([]int{n, rc.m, oh, ow}, dy))
				require.NoError(t, err)
				return yv.Data().([]float32), dxv.Data().([]float32)
			}
			yAll, dxAll := run(rc.n, x, dy)
			for i := 0; i < rc.n; i++ {
				y1, dx1 := run(1, x[i*sx:(i+1)*sx], dy[i*sy:(i+1)*sy])
				require.Equal(t, y1, yAll[i*sy:(i+1)*sy], "forward sample %d", i)
				require.Equal(t, dx1, dxAll[i*sx:(i+1)*sx], "input gradient sample %d", i)
			}
		})
	}
}

func TestConvPreallocNoAllocs(t *testing.T) {
	// A warm float32 op given a fitting prealloc allocates nothing; for
	// both dtypes a fitting prealloc is used and written in full: the whole
	// output (prealloc starts as NaN, IEEE 754 quiet NaN) and matches a
	// run into a new tensor bit for bit (common practice).
	rng := rand.New(rand.NewSource(43))
	for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
		rc := convRouteCase{n: 3, c: 4, h: 12, w: 17, m: 8, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1}, sh: 1, sw: 1, dh: 1, dw: 1, group: 1, bias: true}
		oh, ow := rc.out()
		mk := func(shape ...int) *tensor.Dense {
			n := tensor.Shape(shape).TotalSize()
			if dt == tensor.Float32 {
				return convDense32(shape, convTo32(randomInput(rng, n)))
			}
			return convDense64(shape, randomInput(rng, n))
		}
		nan := func(shape ...int) *tensor.Dense {
			d := mk(shape...)
			if dt == tensor.Float32 {
				for i := range d.Float32s() {
					d.Float32s()[i] = float32(math.NaN())
				}
			} else {
				for i := range d.Float64s() {
					d.Float64s()[i] = math.NaN()
				}
			}
			return d
		}
		x, w, b, dy := mk(rc.n, rc.c, rc.h, rc.w), mk(rc.m, rc.c, rc.kh, rc.kw), mk(rc.m), mk(rc.n, rc.m, oh, ow)
		t.Run(dt.String(), func(t *testing.T) {
			op := rc.op()
			back := &convBackOp{convOp: *rc.op(), wrt: 0}
			back.slot = new(convSlot)
			want, err := op.Do(x, w, b)
			require.NoError(t, err)
			wantDX, err := back.Do(x, w, dy)
			require.NoError(t, err)
			y, dx := nan(rc.n, rc.m, oh, ow), nan(rc.n, rc.c, rc.h, rc.w)
			got, err := op.UsePreallocDo(y, x, w, b)
			require.NoError(t, err)
			require.Same(t, y, got)
			require.Equal(t, want.Data(), y.Data())
			gotDX, err := back.UsePreallocDo(dx, x, w, dy)
			require.NoError(t, err)
			require.Same(t, dx, gotDX)
			require.Equal(t, wantDX.Data(), dx.Data())

			// A prealloc of the wrong shape or one that is an input is not
			// used (buffer contract of UsePreallocDo).
			other, err := op.UsePreallocDo(mk(rc.n, rc.m, oh, ow+1), x, w, b)
			require.NoError(t, err)
			require.Equal(t, want.Data(), other.Data())
			same, err := back.UsePreallocDo(x, x, w, dy)
			require.NoError(t, err)
			require.NotSame(t, x, same)

			vals, bvals := []G.Value{x, w, b}, []G.Value{x, w, dy}
			if dt == tensor.Float64 || !f32.Asm() {
				// float64 (and float32 without the AVX2/FMA kernel) keeps
				// im2col + gonum's GEMM, which allocates (and may start
				// goroutines) per call.
				return
			}
			allocs := testing.AllocsPerRun(20, func() {
				if _, err := op.UsePreallocDo(y, vals...); err != nil {
					panic(err)
				}
			})
			require.Zero(t, allocs, "forward allocations per warm call")
			allocs = testing.AllocsPerRun(20, func() {
				if _, err := back.UsePreallocDo(dx, bvals...); err != nil {
					panic(err)
				}
			})
			require.Zero(t, allocs, "input-gradient allocations per warm call")

		})
	}
}

func TestConvConcurrentDo32(t *testing.T) {
	// Concurrent runs of one float32 op instance give the serial result bit
	// for bit: a run that finds the op's scratch taken works on its own
	// (common practice; run with -race).
	rng := rand.New(rand.NewSource(44))
	rc := convRouteCase{n: 2, c: 3, h: 10, w: 21, m: 7, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1}, sh: 1, sw: 1, dh: 1, dw: 1, group: 1, bias: true}
	x := convDense32([]int{rc.n, rc.c, rc.h, rc.w}, convTo32(randomInput(rng, rc.n*rc.c*rc.h*rc.w)))
	w := convDense32([]int{rc.m, rc.c, 3, 3}, convTo32(randomInput(rng, rc.m*rc.c*9)))
	b := convDense32([]int{rc.m}, convTo32(randomInput(rng, rc.m)))
	op := rc.op()
	want, err := op.Do(x, w, b)
	require.NoError(t, err)
	errs := make(chan error, 8)
	for i := 0; i < 8; i++ {
		go func() {
			for k := 0; k < 20; k++ {
				v, err := op.Do(x, w, b)
				if err == nil && !convEqual32(v.Data().([]float32), want.Data().([]float32)) {
					err = fmt.Errorf("run %d differs from the serial result", k)
				}
				if err != nil {
					errs <- err
					return
				}
			}
			errs <- nil
		}()
	}
	for i := 0; i < 8; i++ {
		require.NoError(t, <-errs)
	}
}

func convEqual32(a, b []float32) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float32bits(a[i]) != math.Float32bits(b[i]) {
			return false
		}
	}
	return true
}

func TestConvScratchReuse(t *testing.T) {
	// One op instance run on alternating input sizes (its cached geometry,
	// plan and padded buffer change each time) gives the results of fresh
	// instances bit for bit, so nothing stale survives a change (common
	// practice).
	rng := rand.New(rand.NewSource(46))
	for _, pads := range [][4]int{{1, 1, 1, 1}, {0, 0, 0, 0}, {2, 0, 1, 2}} {
		op := (convRouteCase{m: 6, kh: 3, kw: 3, pads: pads, sh: 1, sw: 1, dh: 1, dw: 1, group: 1, bias: true}).op()
		back := &convBackOp{convOp: *op, wrt: 0}
		back.slot = new(convSlot)
		w := convDense32([]int{6, 2, 3, 3}, convTo32(randomInput(rng, 6*2*9)))
		b := convDense32([]int{6}, convTo32(randomInput(rng, 6)))
		for _, hw := range [][2]int{{9, 16}, {12, 7}, {9, 16}, {5, 33}, {12, 7}} {
			rc := convRouteCase{n: 2, c: 2, h: hw[0], w: hw[1], m: 6, kh: 3, kw: 3, pads: pads, sh: 1, sw: 1, dh: 1, dw: 1, group: 1, bias: true}
			oh, ow := rc.out()
			x := convDense32([]int{2, 2, hw[0], hw[1]}, convTo32(randomInput(rng, 2*2*hw[0]*hw[1])))
			dy := convDense32([]int{2, 6, oh, ow}, convTo32(randomInput(rng, 2*6*oh*ow)))
			got, err := op.Do(x, w, b)
			require.NoError(t, err)
			want, err := rc.op().Do(x, w, b)
			require.NoError(t, err)
			require.Equal(t, want.Data(), got.Data(), "forward %v pads %v", hw, pads)
			gotDX, err := back.Do(x, w, dy)
			require.NoError(t, err)
			wantDX, err := (&convBackOp{convOp: *rc.op(), wrt: 0}).Do(x, w, dy)
			require.NoError(t, err)
			require.Equal(t, wantDX.Data(), gotDX.Data(), "input gradient %v pads %v", hw, pads)
		}
	}
}

func TestConvVariableWeightsRepacked(t *testing.T) {
	// Packed weights are reused only for model constants: an op whose
	// weights are a variable sees new values in the same tensor on the next
	// run, forward and input gradient (compared with fresh instances,
	// checked against the ONNX Conv definition in TestConvRoutes).
	rng := rand.New(rand.NewSource(47))
	rc := convRouteCase{n: 1, c: 3, h: 8, w: 16, m: 7, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1}, sh: 1, sw: 1, dh: 1, dw: 1, group: 1, bias: true}
	op := rc.op()
	op.constW = false
	back := &convBackOp{convOp: *op, wrt: 0}
	back.slot = new(convSlot)
	x := convDense32([]int{1, 3, 8, 16}, convTo32(randomInput(rng, 3*8*16)))
	dy := convDense32([]int{1, 7, 8, 16}, convTo32(randomInput(rng, 7*8*16)))
	b := convDense32([]int{7}, convTo32(randomInput(rng, 7)))
	w := convDense32([]int{7, 3, 3, 3}, convTo32(randomInput(rng, 7*27)))
	for k := 0; k < 3; k++ {
		copy(w.Float32s(), convTo32(randomInput(rng, 7*27)))
		fresh := rc.op()
		fresh.constW = false
		want, err := fresh.Do(x, w, b)
		require.NoError(t, err)
		got, err := op.Do(x, w, b)
		require.NoError(t, err)
		require.Equal(t, want.Data(), got.Data(), "forward run %d", k)
		wantDX, err := (&convBackOp{convOp: *fresh, wrt: 0}).Do(x, w, dy)
		require.NoError(t, err)
		gotDX, err := back.Do(x, w, dy)
		require.NoError(t, err)
		require.Equal(t, wantDX.Data(), gotDX.Data(), "input gradient run %d", k)
	}
}

func TestConvKernInPlace(t *testing.T) {
	// f32.Conv6x16 reading the strip in place equals f32.Gemm6x16 on the same
	// strip packed by sconvPackStrip bit for bit (both are one chain of
	// fused multiply-adds in the order of p, as documented on f32.Gemm6x16; the
	// bias is added with one rounding like f32.Gemm6x16's beta = 1 store onto
	// a bias-filled tile), and is within the float32 dot-product bound of
	// the float64 sum (Higham 2002, eq. 3.5; from memory). The old contents
	// of c are not read (NaN there, IEEE 754, would propagate).
	rng := rand.New(rand.NewSource(48))
	var pl sconvPlan
	pl.init(sconvGeom{c: 5, hp: 9, wp: 40, kh: 3, kw: 5, dh: 2, dw: 1, sh: 1, sw: 1, oh: 5, ow: 32})
	require.Equal(t, sconvRows, pl.mode)
	k := pl.g.k()
	xp64 := convTo64(convTo32(randomInput(rng, pl.padLen())))
	a64 := convTo64(convTo32(randomInput(rng, 6*k)))
	bias64 := convTo64(convTo32(randomInput(rng, 6)))
	xp, a, bias := convTo32(xp64), convTo32(a64), convTo32(bias64)
	strip := make([]float32, k*sgemmNR)
	const ldc = 20
	for _, q0 := range []int{0, 16, 64, 144} {
		sconvPackStrip(&pl.g, xp, q0, sgemmNR, strip)
		oy, ox := q0/pl.g.ow, q0%pl.g.ow
		for _, withBias := range []bool{false, true} {
			got := make([]float32, 6*ldc)
			for i := range got {
				got[i] = float32(math.NaN())
			}
			want := make([]float32, 6*ldc)
			var bp *float32
			var beta float32
			if withBias {
				bp, beta = &bias[0], 1
				for r := 0; r < 6; r++ {
					for j := 0; j < 16; j++ {
						want[r*ldc+j] = bias[r]
					}
				}
			}
			f32.Conv6x16(k, &a[0], &xp[oy*pl.g.wp+ox], &pl.off[0], &got[0], ldc, bp)
			f32.Gemm6x16(k, &a[0], &strip[0], &want[0], ldc, 1, beta)
			for r := 0; r < 6; r++ {
				require.Equal(t, want[r*ldc:r*ldc+16], got[r*ldc:r*ldc+16], "q0 %d bias %t row %d", q0, withBias, r)
				for j := 16; j < ldc; j++ {
					require.True(t, math.IsNaN(float64(got[r*ldc+j])), "column %d past the tile was written", j)
				}
				for j := 0; j < 16; j++ {
					var s, mag float64
					for p := 0; p < k; p++ {
						v := a64[6*p+r] * xp64[int(pl.off[p])+oy*pl.g.wp+ox+j]
						s += v
						mag += math.Abs(v)
					}
					if withBias {
						s += bias64[r]
						mag += math.Abs(bias64[r])
					}
					convRequireBound(t, "in-place kernel", []float64{float64(got[r*ldc+j])}, []float64{s}, []float64{mag}, k, 0x1p-24)
				}
			}
		}
	}
}

func TestConvFastNaN(t *testing.T) {
	// IEEE 754: NaN propagates through multiply-add, so on the float32
	// routes exactly the outputs whose window reads the NaN input (forward)
	// or the NaN output gradient (input gradient) are NaN; windows over the
	// padding read zeros (ONNX Conv operator doc).
	rng := rand.New(rand.NewSource(49))
	for _, W := range []int{20, 32} { // sconvGrid and sconvRows
		convFastNaN(t, rng, W)
	}
}

func convFastNaN(t *testing.T, rng *rand.Rand, W int) {
	rc := convRouteCase{n: 1, c: 2, h: 6, w: W, m: 7, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1}, sh: 1, sw: 1, dh: 1, dw: 1, group: 1, bias: true}
	x64 := randomInput(rng, 2*6*W)
	x64[(1*6+2)*W+5] = math.NaN() // channel 1, row 2, column 5
	w64 := randomInput(rng, 7*2*9)
	b64 := randomInput(rng, 7)
	dy64 := randomInput(rng, 7*6*W)
	dy64[(3*6+4)*W+W-1] = math.NaN() // channel 3, row 4, last column
	y, err := rc.op().Do(convDense32([]int{1, 2, 6, W}, convTo32(x64)), convDense32([]int{7, 2, 3, 3}, convTo32(w64)), convDense32([]int{7}, convTo32(b64)))
	require.NoError(t, err)
	for i, v := range y.Data().([]float32) {
		oy, ox := i/W%6, i%W
		near := oy >= 1 && oy <= 3 && ox >= 4 && ox <= 6
		require.Equal(t, near, math.IsNaN(float64(v)), "output %d", i)
	}
	back := &convBackOp{convOp: *rc.op(), wrt: 0}
	dx, err := back.Do(convDense32([]int{1, 2, 6, W}, convTo32(x64)), convDense32([]int{7, 2, 3, 3}, convTo32(w64)), convDense32([]int{1, 7, 6, W}, convTo32(dy64)))
	require.NoError(t, err)
	for i, v := range dx.Data().([]float32) {
		iy, ix := i/W%6, i%W
		near := iy >= 3 && iy <= 5 && ix >= W-2
		require.Equal(t, near, math.IsNaN(float64(v)), "input gradient %d", i)
	}
}

func TestConvDriverMatchesStripTiles(t *testing.T) {
	// sconvSample stores, at every output element, the bits f32.Conv6x16
	// stores for it on its own 16-position strip and 6-row block of weights
	// (one chain of fused multiply-adds in the order of p, then the bias
	// with one rounding: the kernels' contract, which the f32 tests check
	// against math/big), whether the driver runs the strip alone, paired
	// with its neighbour in a 6×32, 4×32 or 8×32 tile, in a row of 128
	// (one output channel), or through the edge tile:
	// strip counts even and odd, output rows whole and not, row counts with
	// every remainder of 6 that chooses blocks of 4, in both in-place modes.
	rng := rand.New(rand.NewSource(49))
	for _, tc := range []struct {
		g    sconvGeom
		m    int
		mode int
	}{
		{sconvGeom{c: 3, hp: 34, wp: 34, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: 32, ow: 32}, 16, sconvRows},
		{sconvGeom{c: 2, hp: 7, wp: 18, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: 5, ow: 16}, 3, sconvRows},
		{sconvGeom{c: 4, hp: 11, wp: 50, kh: 3, kw: 3, dh: 1, dw: 2, sh: 2, sw: 1, oh: 3, ow: 48}, 12, sconvRows},
		{sconvGeom{c: 2, hp: 7, wp: 34, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: 5, ow: 32}, 32, sconvRows},
		{sconvGeom{c: 2, hp: 7, wp: 34, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: 5, ow: 32}, 13, sconvRows},
		{sconvGeom{c: 1, hp: 30, wp: 30, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: 28, ow: 28}, 8, sconvGrid},
		{sconvGeom{c: 8, hp: 30, wp: 30, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: 28, ow: 28}, 1, sconvGrid},
		{sconvGeom{c: 2, hp: 16, wp: 16, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: 14, ow: 14}, 16, sconvGrid},
		{sconvGeom{c: 3, hp: 9, wp: 13, kh: 3, kw: 2, dh: 1, dw: 1, sh: 1, sw: 1, oh: 7, ow: 12}, 7, sconvGrid},
	} {
		t.Run(fmt.Sprintf("%+v_m%d", tc.g, tc.m), func(t *testing.T) {
			var pl sconvPlan
			pl.init(tc.g)
			require.Equal(t, tc.mode, pl.mode)
			k, m := pl.g.k(), tc.m
			m6 := (m + sgemmMR - 1) / sgemmMR * sgemmMR
			xp := convTo32(randomInput(rng, pl.padLen()))
			wp := make([]float32, sconvPackedLen(m, k))
			sconvPackWeights(convTo32(randomInput(rng, m*k)), m, k, wp)
			b := convTo32(randomInput(rng, m6))
			p := tc.g.oh * tc.g.ow
			y := make([]float32, m*p)
			var tile sconvTile
			sconvSample(&pl, xp, wp, m, b, y, make([]float32, k*sgemmNR), make([]float32, pl.scratchLen(m)), &tile)
			var want [sgemmMR * sgemmNR]float32
			for oy := 0; oy < tc.g.oh; oy++ {
				for ox := 0; ox < tc.g.ow; ox++ {
					q := oy*tc.g.ow + ox // position in y
					g := oy*tc.g.wp + ox // position on the padded grid
					s0, xb := q&^(sgemmNR-1), sconvRowsStart(&pl.g, q&^(sgemmNR-1))
					if pl.mode == sconvGrid {
						s0, xb = g&^(sgemmNR-1), g&^(sgemmNR-1)
					}
					col := q - s0
					if pl.mode == sconvGrid {
						col = g - s0
					}
					for ir, s := 0, 0; ir < m; s++ {
						blk := sconvBlock(m, ir)
						f32.Conv6x16(k, &wp[s*sgemmMR*k], &xp[xb], &pl.off[0], &want[0], sgemmNR, &b[ir])
						for r := 0; r < min(blk, m-ir); r++ {
							require.Equal(t, math.Float32bits(want[r*sgemmNR+col]), math.Float32bits(y[(ir+r)*p+q]),
								"channel %d, output (%d, %d)", ir+r, oy, ox)
						}
						ir += blk
					}
				}
			}
		})
	}
}

func TestConvMaskedInputGrad(t *testing.T) {
	// The masked input gradient (the fused Relu's mask applied by the
	// Conv gradient itself) equals the plain input gradient of the masked
	// dy that reluDiff stores (dy where y > 0, +0 elsewhere; Relu's
	// derivative, common practice) bit for bit, on the packed driver (the
	// mask applied while padding, while cropping, and with no padding) and
	// on the other routes (a stride of 2, float64), with −0, +0 and NaN
	// among the outputs y.
	rng := rand.New(rand.NewSource(50))
	for _, rc := range []convRouteCase{
		{n: 3, c: 3, h: 12, w: 16, m: 5, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1}, sh: 1, sw: 1, dh: 1, dw: 1, group: 1},
		{n: 3, c: 4, h: 9, w: 11, m: 6, kh: 3, kw: 3, pads: [4]int{3, 2, 0, 1}, sh: 1, sw: 1, dh: 1, dw: 1, group: 2},
		{n: 2, c: 3, h: 5, w: 16, m: 4, kh: 3, kw: 3, pads: [4]int{2, 2, 2, 2}, sh: 1, sw: 1, dh: 1, dw: 1, group: 1},
		{n: 2, c: 3, h: 11, w: 9, m: 4, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1}, sh: 2, sw: 2, dh: 1, dw: 1, group: 1},
	} {
		t.Run(rc.String(), func(t *testing.T) {
			oh, ow := rc.out()
			x := randomInput(rng, rc.n*rc.c*rc.h*rc.w)
			w := randomInput(rng, rc.m*rc.c/rc.group*rc.kh*rc.kw)
			dy := randomInput(rng, rc.n*rc.m*oh*ow)
			y := randomInput(rng, len(dy))
			for i := range y {
				switch i % 9 {
				case 0:
					y[i] = math.Copysign(0, -1)
				case 1:
					y[i] = 0
				case 2:
					y[i] = math.NaN()
				}
			}
			xs, ws, ys := []int{rc.n, rc.c, rc.h, rc.w}, []int{rc.m, rc.c / rc.group, rc.kh, rc.kw}, []int{rc.n, rc.m, oh, ow}
			masked := &convBackOp{convOp: *rc.op(), wrt: 0, masked: true}
			plain := &convBackOp{convOp: *rc.op(), wrt: 0}
			got32, err := masked.Do(convDense32(xs, convTo32(x)), convDense32(ws, convTo32(w)), convDense32(ys, convTo32(dy)), convDense32(ys, convTo32(y)))
			require.NoError(t, err)
			d32 := make([]float32, len(dy))
			reluDiff(d32, convTo32(y), convTo32(dy))
			want32, err := plain.Do(convDense32(xs, convTo32(x)), convDense32(ws, convTo32(w)), convDense32(ys, d32))
			require.NoError(t, err)
			require.Equal(t, poolBits(t, want32), poolBits(t, got32), "float32")
			got64, err := masked.Do(convDense64(xs, x), convDense64(ws, w), convDense64(ys, dy), convDense64(ys, y))
			require.NoError(t, err)
			d64 := make([]float64, len(dy))
			reluDiff(d64, y, dy)
			want64, err := plain.Do(convDense64(xs, x), convDense64(ws, w), convDense64(ys, d64))
			require.NoError(t, err)
			require.Equal(t, poolBits(t, want64), poolBits(t, got64), "float64")
		})
	}
}
