package gradattr

import (
	"context"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestGradCAMLinearClosedForm(t *testing.T) {
	// y = w·A + b with A of shape (2, 3): ∂y/∂A = w, so α_c is the mean
	// of w over channel c and the map is ReLU(Σ_c α_c A_c) (Selvaraju et
	// al. 2017, eq. 1–2), worked by hand: α = (1, -0.5).
	f := linear([]float64{2, 0, 1, -1, 0, -0.5}, 0.3)
	f.Shape = []int{2, 3}
	a := []float64{1, -2, 0.5, 4, 1, -3}
	r, err := GradCAM(context.Background(), f, a, 0)
	require.NoError(t, err)
	// Σ_c α_c A_c = (1 − 2, −2 − 0.5, 0.5 + 1.5) = (−1, −2.5, 2)
	assert.InDeltaSlice(t, []float64{0, 0, 2}, r.Attributions, 1e-15)
	assert.Equal(t, []int{3}, r.Shape)
	assert.Nil(t, r.Completeness)
	assert.Equal(t, MethodGradCAM, r.Settings.Method)
	assert.Equal(t, 1, r.Cost.GradientEvals)

	f.Shape = []int{6}
	_, err = GradCAM(context.Background(), f, a, 0)
	assert.ErrorIs(t, err, ErrOptions, "no spatial axis")
}
