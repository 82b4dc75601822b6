package render

import (
	"testing"

	"github.com/stretchr/testify/assert"
)

func TestBilinear(t *testing.T) {
	// A plane m(i, j) = 2i − j + 1 on a 2×3 grid, doubled to 4×6: inside the
	// grid's cell centres bilinear interpolation reproduces a plane exactly;
	// outside them the coordinates clamp to the edge (closed form worked by
	// hand with the half-pixel convention: output i reads (i + ½)/2 − ½).
	m := []float64{1, 0, -1, 3, 2, 1}
	got := Bilinear(m, 2, 3, 4, 6)
	plane := func(y, x float64) float64 { return 2*y - x + 1 }
	clamp := func(v, hi float64) float64 { return min(max(v, 0), hi) }
	for i := range 4 {
		for j := range 6 {
			y, x := clamp((float64(i)+0.5)/2-0.5, 1), clamp((float64(j)+0.5)/2-0.5, 2)
			assert.InDelta(t, plane(y, x), got[i*6+j], 1e-12, "(%d, %d)", i, j)
		}
	}
	assert.Equal(t, []float64{5, 5, 5, 5}, Bilinear([]float64{5}, 1, 1, 2, 2), "a constant stays constant")
}
