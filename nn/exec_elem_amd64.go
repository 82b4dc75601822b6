//go:build amd64 && !purego

package nn

import "golang.org/x/sys/cpu"

// execReluAVX2 stores y[i] = max(0, x[i]) for i < n, n a multiple of 8
// (exec_elem_amd64.s).
//
//go:noescape
func execReluAVX2(y, x *float32, n int)

// execReluDiffAVX2 stores d[i] = dy[i] where x[i] > 0 and 0 elsewhere for
// i < n, n a multiple of 8 (exec_elem_amd64.s).
//
//go:noescape
func execReluDiffAVX2(d, x, dy *float32, n int)

// execHasAVX2 reports whether the vector Relu kernels can run.
var execHasAVX2 = cpu.X86.HasAVX2

// execReluF32 stores y[i] = max(0, x[i]); len(y) == len(x).
func execReluF32(y, x []float32) {
	n := len(x) &^ 7
	if execHasAVX2 && n > 0 {
		execReluAVX2(&y[0], &x[0], n)
	} else {
		n = 0
	}
	execReluGo(y[n:len(x)], x[n:])
}

// execReluDiffF32 stores d[i] = g[i] where x[i] > 0 and 0 elsewhere;
// the three slices have one length.
func execReluDiffF32(d, x, g []float32) {
	n := len(x) &^ 7
	if execHasAVX2 && n > 0 {
		execReluDiffAVX2(&d[0], &x[0], &g[0], n)
	} else {
		n = 0
	}
	execReluDiffGo(d[n:len(x)], x[n:], g[n:len(x)])
}
