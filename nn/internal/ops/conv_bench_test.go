package ops

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"fmt"
	"math/rand"
	"testing"
)

// convBenchShapes are the convolutions of the bench/models networks: 3×3,
// pad 1, stride 1, with bias.
var convBenchShapes = []struct {
	name    string
	c, m, h int
}{
	{"cnn-s/1to8@28", 1, 8, 28},
	{"cnn-s/8to16@14", 8, 16, 14},
	{"cnn-m/3to16@32", 3, 16, 32},
	{"cnn-m/16to16@32", 16, 16, 32},
	{"cnn-m/16to32@16", 16, 32, 16},
	{"cnn-m/32to32@16", 32, 32, 16},
}

// BenchmarkConvShapes times the float32 forward convolution and input
// gradient on the bench/models shapes at batch 1, 50 and 64, through the
// packed driver (route "packed": UsePreallocDo into a reused output) and
// the im2col route (route "im2col": convForward / convBackward into the
// same output), and reports GFLOP/s = 2·MACs / time.
func BenchmarkConvShapes(b *testing.B) {
	rng := rand.New(rand.NewSource(1))
	for _, s := range convBenchShapes {
		for _, n := range []int{1, 50, 64} {
			rc := convRouteCase{n: n, c: s.c, h: s.h, w: s.h, m: s.m, kh: 3, kw: 3, pads: [4]int{1, 1, 1, 1},
				sh: 1, sw: 1, dh: 1, dw: 1, group: 1, bias: true}
			x := convDense32([]int{n, s.c, s.h, s.h}, convTo32(randomInput(rng, n*s.c*s.h*s.h)))
			w := convDense32([]int{s.m, s.c, 3, 3}, convTo32(randomInput(rng, s.m*s.c*9)))
			bias := convDense32([]int{s.m}, convTo32(randomInput(rng, s.m)))
			dy := convDense32([]int{n, s.m, s.h, s.h}, convTo32(randomInput(rng, n*s.m*s.h*s.h)))
			y := convDense32([]int{n, s.m, s.h, s.h}, make([]float32, n*s.m*s.h*s.h))
			dx := convDense32([]int{n, s.c, s.h, s.h}, make([]float32, n*s.c*s.h*s.h))
			flops := 2 * float64(n*s.m*s.c*9*s.h*s.h)
			op := rc.op()
			back := &convBackOp{convOp: *rc.op(), wrt: 0}
			g := convGeomOf(2, []int{s.h, s.h}, []int{3, 3}, op.pads, op.strides, op.dils, []int{s.h, s.h})
			run := func(name string, f func() error) {
				b.Run(fmt.Sprintf("%s/%s/b%d", s.name, name, n), func(b *testing.B) {
					if err := f(); err != nil {
						b.Fatal(err)
					}
					b.ReportAllocs()
					b.ResetTimer()
					for i := 0; i < b.N; i++ {
						if err := f(); err != nil {
							b.Fatal(err)
						}
					}
					b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
				})
			}
			run("fwd/packed", func() error { _, err := op.UsePreallocDo(y, x, w, bias); return err })
			run("fwd/im2col", func() error {
				convForward(&g, n, s.c, s.m, 1, x.Float32s(), w.Float32s(), bias.Float32s(), y.Float32s())
				return nil
			})
			run("dx/packed", func() error { _, err := back.UsePreallocDo(dx, x, w, dy); return err })
			run("dx/im2col", func() error {
				r := dx.Float32s()
				clear(r)
				convBackward(&g, 0, n, s.c, s.m, 1, x.Float32s(), w.Float32s(), dy.Float32s(), r)
				return nil
			})
		}
	}
}

// BenchmarkConvPackStrip times the fused im2col packing of one sample of
// cnn-m's 16→16 convolution at 32×32 (K = 144, 64 strips).
func BenchmarkConvPackStrip(b *testing.B) {
	rng := rand.New(rand.NewSource(2))
	g := sconvGeom{c: 16, hp: 34, wp: 34, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: 32, ow: 32}
	xp := convTo32(randomInput(rng, g.c*g.hp*g.wp))
	strip := make([]float32, g.k()*sgemmNR)
	b.SetBytes(int64(4 * g.k() * g.oh * g.ow))
	for i := 0; i < b.N; i++ {
		for q0 := 0; q0 < g.oh*g.ow; q0 += sgemmNR {
			sconvPackStrip(&g, xp, q0, sgemmNR, strip)
		}
	}
}

// BenchmarkConvPad times padding one sample of cnn-m's 16→16 convolution
// input (16×32×32 into 16×34×34): "copy" is padInput with the zero borders
// already laid out (the per-sample cost), "full" is sconvPad writing borders
// and interior.
func BenchmarkConvPad(b *testing.B) {
	rng := rand.New(rand.NewSource(3))
	x := convTo32(randomInput(rng, 16*32*32))
	var s convScratch
	s.plan.init(sconvGeom{c: 16, hp: 34, wp: 34, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: 32, ow: 32})
	b.Run("copy", func(b *testing.B) {
		b.SetBytes(4 * 16 * 34 * 34)
		for i := 0; i < b.N; i++ {
			s.padInput(x, nil, 16, 32, 32, 1, 1, 1, 1)
		}
	})
	b.Run("full", func(b *testing.B) {
		dst := make([]float32, 16*34*34)
		b.SetBytes(4 * 16 * 34 * 34)
		for i := 0; i < b.N; i++ {
			sconvPad(x, 16, 32, 32, 1, 1, 1, 1, dst)
		}
	})
}

// BenchmarkConvStripKernel times one sample of cnn-m's 16→16 convolution at
// 32×32 (64 strips × 3 channel tiles, K = 144) with the strip read in place
// by f32.Conv6x16 ("inplace") and packed by sconvPackStrip for f32.Gemm6x16
// ("packed").
func BenchmarkConvStripKernel(b *testing.B) {
	if !f32.Asm() {
		b.Skip("the kernels run in assembly only with AVX2 and FMA")
	}
	rng := rand.New(rand.NewSource(5))
	var pl sconvPlan
	pl.init(sconvGeom{c: 16, hp: 34, wp: 34, kh: 3, kw: 3, dh: 1, dw: 1, sh: 1, sw: 1, oh: 32, ow: 32})
	k, p := pl.g.k(), 32*32
	xp := convTo32(randomInput(rng, pl.padLen()))
	wp := make([]float32, sconvPackedLen(16, k))
	sconvPackWeights(convTo32(randomInput(rng, 16*k)), 16, k, wp)
	strip := make([]float32, k*sgemmNR)
	var tile [sgemmMR * sgemmNR]float32
	y := make([]float32, 16*p)
	flops := 2 * float64(16*k*p)
	for _, inplace := range []bool{true, false} {
		name := "packed"
		if inplace {
			name = "inplace"
		}
		b.Run(name, func(b *testing.B) {
			for i := 0; i < b.N; i++ {
				for q0 := 0; q0 < p; q0 += sgemmNR {
					xb := &xp[q0/32*34+q0%32]
					if !inplace {
						sconvPackStrip(&pl.g, xp, q0, sgemmNR, strip)
					}
					for ir := 0; ir < 16; ir += sgemmMR {
						c := &y[ir*p+q0]
						ldc := p
						if ir+sgemmMR > 16 {
							c, ldc = &tile[0], sgemmNR
						}
						if inplace {
							f32.Conv6x16(k, &wp[ir*k], xb, &pl.off[0], c, ldc, nil)
						} else {
							f32.Gemm6x16(k, &wp[ir*k], &strip[0], c, ldc, 1, 0)
						}
					}
				}
			}
			b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		})
	}
}
