//go:build amd64 && !purego

package nn

import "golang.org/x/sys/cpu"

// poolMax2x2F32AVX2 is the forward kernel in pooling_amd64.s; it requires
// planes ≥ 1, oh ≥ 1, 4 ≤ ow, 2·ow ≤ w, 2·oh ≤ h.
//
//go:noescape
func poolMax2x2F32AVX2(x, y *float32, planes, h, w, oh, ow int) bool

// poolMax2x2BackF32AVX2 is the backward kernel in pooling_amd64.s, with the
// conditions of poolMax2x2F32AVX2.
//
//go:noescape
func poolMax2x2BackF32AVX2(x, dy, dx *float32, planes, h, w, oh, ow int) bool

func init() {
	if !cpu.X86.HasAVX2 {
		return
	}
	poolMax2x2F32 = func(x, y []float32, planes, h, w, oh, ow int) bool {
		if !poolKernelFits(len(x), len(y), planes, h, w, oh, ow) {
			return true
		}
		return poolMax2x2F32AVX2(&x[0], &y[0], planes, h, w, oh, ow)
	}
	poolMax2x2BackF32 = func(x, dy, dx []float32, planes, h, w, oh, ow int) bool {
		if !poolKernelFits(len(x), len(dy), planes, h, w, oh, ow) || len(dx) < len(x) {
			return true
		}
		return poolMax2x2BackF32AVX2(&x[0], &dy[0], &dx[0], planes, h, w, oh, ow)
	}
}

// poolKernelFits checks the assembly kernels' conditions, so that they
// never read or write outside the slices; a false return sends the caller
// to the portable kernel.
func poolKernelFits(nx, ny, planes, h, w, oh, ow int) bool {
	return planes >= 1 && oh >= 1 && ow >= 4 && 2*ow <= w && 2*oh <= h &&
		nx >= planes*h*w && ny >= planes*oh*ow
}
