package cpupeak

import (
	"math"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
)

// TestGFLOPSIsPlausible bounds the measured rate by what an x86 core can do:
// at most two FMA pipes of the loop's width (256-bit: 16 fused
// multiply-adds of float32, 32 FLOPs per cycle; 512-bit: 64 FLOPs) at under
// 6 GHz, so under 192 or 384 GFLOP/s (vendor optimisation manuals, from
// memory). A loop that did not run the FMAs, or counted them
// twice, would land outside; a loaded machine lowers it, hence only a lower
// bound of 1 GFLOP/s.
func TestGFLOPSIsPlausible(t *testing.T) {
	g := GFLOPS(100 * time.Millisecond)
	if !Available() {
		assert.Equal(t, 0.0, g)
		return
	}
	assert.False(t, math.IsNaN(g))
	assert.Greater(t, g, 1.0)
	assert.Less(t, g, 6*2*FlopsPerIteration()/12)
}
