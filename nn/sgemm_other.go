//go:build !amd64 || purego

package nn

// sgemmKernel is nil on this architecture: sgemm uses gonum's pure-Go BLAS.
var sgemmKernel func(kc int, a, b, c *float32, ldc int, alpha, beta float32)

// sgemmRowKernel is nil on this architecture, like sgemmKernel.
var sgemmRowKernel func(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32)

// sgemmTranspose8 is nil on this architecture, like sgemmKernel.
var sgemmTranspose8 func(src *float32, lds int, dst *float32, ldd int)

// sgemmStridedKernel is nil on this architecture, like sgemmKernel.
var sgemmStridedKernel func(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32)

// sgemmCopy16 is nil on this architecture, like sgemmKernel.
var sgemmCopy16 func(src *float32, lds int, dst *float32, rows int)

// sgemmEdgeKernel is nil on this architecture, like sgemmKernel.
var sgemmEdgeKernel func(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32, mr int)
