package gradattr

import (
	"context"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestFuncModel(t *testing.T) {
	// Func evaluates F and Grad sample by sample: a batch of three equals
	// three single evaluations of the closed form x₀x₁ (gradient (x₁, x₀)).
	f := product()
	var m Model = f
	assert.Equal(t, []int{2}, m.InputShape())
	assert.Equal(t, 1, m.OutputSize())
	x := []float64{1, 2, 3, 4, -5, 6}
	out, err := m.Forward(context.Background(), x, 3)
	require.NoError(t, err)
	assert.Equal(t, []float64{2, 12, -30}, out) // closed form x₀x₁
	out, g, err := m.Gradient(context.Background(), x, 3, []int{0, 0, 0})
	require.NoError(t, err)
	assert.Equal(t, []float64{2, 12, -30}, out)
	assert.Equal(t, []float64{2, 1, 4, 3, 6, -5}, g) // closed form (x₁, x₀)

	_, err = m.Forward(context.Background(), x, 2)
	assert.ErrorIs(t, err, ErrInput)
	_, _, err = m.Gradient(context.Background(), x, 3, []int{0})
	assert.ErrorIs(t, err, ErrInput)
	_, _, err = m.Gradient(context.Background(), x, 3, []int{0, 1, 0})
	assert.ErrorIs(t, err, ErrInput)
	_, _, err = (&Func{Shape: []int{2}, Outputs: 1, F: f.F}).Gradient(context.Background(), x, 3, []int{0, 0, 0})
	assert.ErrorIs(t, err, ErrModel)
	_, err = (&Func{Shape: []int{2, 0}, Outputs: 1, F: f.F}).Forward(context.Background(), nil, 0)
	assert.ErrorIs(t, err, ErrModel)
	s := f.InputShape()
	s[0] = 99
	assert.Equal(t, []int{2}, f.Shape, "InputShape returns a copy")
}
