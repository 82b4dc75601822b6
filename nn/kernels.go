package nn

import "github.com/apportion/apportion/nn/internal/asm/f32"

// Kernels names the float32 kernels this build runs on this CPU: "AVX2/FMA
// assembly" on amd64 with AVX2 and FMA (outside -tags purego builds), where
// matrix products and direct convolutions use the packed assembly kernels,
// and "portable Go" elsewhere, where they use gonum and the kernels' Go
// loops.
func Kernels() string {
	if f32.Asm() {
		return "AVX2/FMA assembly"
	}
	return "portable Go"
}
