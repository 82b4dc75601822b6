//go:build amd64 && !purego

package f32

import (
	"math"
	"testing"

	"github.com/stretchr/testify/require"
)

func TestMaxPool2x2AsmNaN(t *testing.T) {
	// The pooling assembly reports a NaN (IEEE 754 quiet or signalling bit
	// pattern) wherever it sits, including in the steps that overlap at
	// the end of a row, and reports none on finite inputs.
	if !useAsm {
		t.Skip("no AVX2 and FMA on this CPU")
	}
	for _, ow := range []int{4, 6, 8, 11, 16} {
		h, w, oh := 5, 2*ow+1, 2
		x := make([]float32, 2*h*w)
		for i := range x {
			x[i] = float32(i % 7)
		}
		y := make([]float32, 2*oh*ow)
		dy := make([]float32, len(y))
		dx := make([]float32, len(x))
		require.True(t, maxPoolFits(len(x), len(y), 2, h, w, oh, ow))
		require.False(t, maxPool2x2Asm(&x[0], &y[0], 2, h, w, oh, ow))
		require.False(t, maxPool2x2GradAsm(&x[0], &dy[0], &dx[0], 2, h, w, oh, ow))
		for _, bits := range []uint32{0x7fc00000, 0xffc00001, 0x7f800001} {
			for p := range x {
				if row, col := (p%(h*w))/w, p%w; row >= 2*oh || col >= 2*ow {
					continue // outside every window: never read
				}
				old := x[p]
				x[p] = math.Float32frombits(bits)
				require.True(t, maxPool2x2Asm(&x[0], &y[0], 2, h, w, oh, ow), "ow %d NaN at %d", ow, p)
				require.True(t, maxPool2x2GradAsm(&x[0], &dy[0], &dx[0], 2, h, w, oh, ow), "ow %d NaN at %d", ow, p)
				x[p] = old
			}
		}
	}
}
