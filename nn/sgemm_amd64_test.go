//go:build amd64 && !purego

package nn

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/apportion/apportion/internal/cpupeak"
)

// BenchmarkFMAPeak reports the float32 fused multiply-add throughput of one
// core with no memory traffic: the ceiling for every GEMM benchmark here.
func BenchmarkFMAPeak(b *testing.B) {
	if !cpupeak.Available() {
		b.Skip("no AVX2/FMA on this CPU")
	}
	const iters = 1 << 16
	cpuLoop(b, cpupeak.FlopsPerIteration*iters, func() { cpupeak.Loop(iters) })
}

// BenchmarkKern6x16 times the micro-kernel alone on packed panels that stay
// in L1 (one 6×kc strip of A, one kc×16 strip of B), at the k depths of the
// models' products: 16, 27 (3×3×3 im2col), 72, 144, 256 and 288.
func BenchmarkKern6x16(b *testing.B) {
	if sgemmKernel == nil {
		b.Skip("no AVX2/FMA on this CPU")
	}
	rng := rand.New(rand.NewPCG(11, 12))
	for _, kc := range []int{16, 27, 72, 144, 256, 288} {
		a := make([]float32, sgemmMR*kc)
		as := make([]float32, sgemmMR*(kc+3))
		p := make([]float32, sgemmNR*kc)
		for i := range a {
			a[i] = float32(rng.Float64())
		}
		for i := range p {
			p[i] = float32(rng.Float64())
		}
		var c [sgemmMR * sgemmNR]float32
		for _, beta := range []float32{0, 1} {
			b.Run(fmt.Sprintf("kc=%d/beta=%v/packed", kc, beta), func(b *testing.B) {
				cpuLoop(b, 2*float64(sgemmMR*sgemmNR*kc), func() { kern6x16(kc, &a[0], &p[0], &c[0], sgemmNR, 1, beta) })
			})
			// The same strip of A read in place (rows kc+3 apart).
			b.Run(fmt.Sprintf("kc=%d/beta=%v/strided", kc, beta), func(b *testing.B) {
				cpuLoop(b, 2*float64(sgemmMR*sgemmNR*kc), func() { kern6x16s(kc, &as[0], kc+3, 1, &p[0], &c[0], sgemmNR, 1, beta) })
			})
		}
	}
}

func TestKern6x16StridedBits(t *testing.T) {
	// kern6x16s on A in place and kern6x16 on the packed strip perform the
	// same fused multiply-add chains, so they store equal IEEE 754 bit
	// patterns (IEEE 754-2008 §5.4.1), for both layouts of A, every beta
	// path and k remainders of the four-way unrolled loop.
	if sgemmKernel == nil {
		t.Skip("no AVX2/FMA on this CPU")
	}
	rng := rand.New(rand.NewPCG(13, 14))
	for _, kc := range []int{1, 2, 3, 4, 5, 27, 256} {
		for _, tA := range []bool{false, true} {
			for _, beta := range []float32{0, 1, -0.5} {
				lda := kc + 3
				rows, ps, rs := sgemmMR, 1, lda
				if tA {
					lda, rows, ps, rs = sgemmMR+2, kc, sgemmMR+2, 1
				}
				a := make([]float32, rows*lda)
				for i := range a {
					a[i] = float32(rng.Float64()*2 - 1)
				}
				bp := make([]float32, sgemmNR*kc)
				for i := range bp {
					bp[i] = float32(rng.Float64()*2 - 1)
				}
				packed := make([]float32, sgemmMR*kc)
				sgemmPackBlockA(tA, a, lda, 0, sgemmMR, 0, kc, packed)
				want := make([]float32, sgemmMR*sgemmNR)
				for i := range want {
					want[i] = float32(rng.Float64())
				}
				got := append([]float32(nil), want...)
				kern6x16(kc, &packed[0], &bp[0], &want[0], sgemmNR, 0.75, beta)
				kern6x16s(kc, &a[0], rs, ps, &bp[0], &got[0], sgemmNR, 0.75, beta)
				for i := range want {
					if math.Float32bits(want[i]) != math.Float32bits(got[i]) {
						t.Fatalf("kc=%d tA=%v beta=%v: c[%d] strided %v, packed %v", kc, tA, beta, i, got[i], want[i])
					}
				}
			}
		}
	}
}

func TestKern6x16EdgeBitsAndBounds(t *testing.T) {
	// kern6x16e must store, for the top mr rows of a tile, the bits
	// kern6x16 gives those elements in a full tile (the same fused
	// multiply-add chains, IEEE 754-2008 §5.4.1), and leave every other
	// element of C untouched: sentinels below and beside keep their bits.
	if sgemmKernel == nil {
		t.Skip("no AVX2/FMA on this CPU")
	}
	rng := rand.New(rand.NewPCG(15, 16))
	const ldc = sgemmNR + 5
	for _, kc := range []int{1, 3, 9, 27, 256} {
		a := make([]float32, sgemmMR*kc)
		bp := make([]float32, sgemmNR*kc)
		for i := range a {
			a[i] = float32(rng.Float64()*2 - 1)
		}
		for i := range bp {
			bp[i] = float32(rng.Float64()*2 - 1)
		}
		for _, beta := range []float32{0, 1, -0.5} {
			for _, alpha := range []float32{1, 0.75} {
				c0 := make([]float32, (sgemmMR+1)*ldc)
				for i := range c0 {
					c0[i] = float32(rng.Float64())
				}
				full := append([]float32(nil), c0...)
				kern6x16(kc, &a[0], &bp[0], &full[0], ldc, alpha, beta)
				for mr := 1; mr <= sgemmMR; mr++ {
					c := append([]float32(nil), c0...)
					kern6x16e(kc, &a[0], 1, sgemmMR, &bp[0], &c[0], ldc, alpha, beta, mr)
					for i := range c {
						r, j := i/ldc, i%ldc
						want := c0[i]
						if r < mr && j < sgemmNR {
							want = full[i]
						}
						if math.Float32bits(want) != math.Float32bits(c[i]) {
							t.Fatalf("kc=%d alpha=%v beta=%v mr=%d: c[%d][%d] = %v, want %v", kc, alpha, beta, mr, r, j, c[i], want)
						}
					}
				}
			}
		}
	}
}
