package gradattr

import (
	"context"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestGroupsPartitionKeepsCompleteness(t *testing.T) {
	// Σ_g Σ_{i∈g} a_i = Σ_i a_i when the groups partition the features
	// (associativity of the sum), so the completeness of integrated
	// gradients (Sundararajan et al. 2017, Proposition 1) carries over.
	net := newTanhNet(12, 5, 2, 10)
	x := make([]float64, 12)
	for i := range x {
		x[i] = float64(i%5)/2 - 1
	}
	m := net.model()
	m.Shape = []int{1, 3, 4}
	r, err := IntegratedGradients(context.Background(), m, x, 0, IGOptions{Rule: RuleGaussLegendre, Points: 32})
	require.NoError(t, err)
	grids, err := GridGroups(r.Shape, 2, 3)
	require.NoError(t, err)
	fields, err := FieldGroups([]string{"a", "b", "c"}, []int{5, 3, 4})
	require.NoError(t, err)
	labels := LabelGroups([]int{2, 2, 0, 1, 1, 0, 2, 7, 7, 0, 1, 2}, map[int]string{0: "sky", 2: "road"})
	for _, groups := range [][]Group{grids, fields, labels} {
		g, err := r.Grouped(groups)
		require.NoError(t, err)
		assert.True(t, g.Partition)
		s := 0.0
		for _, v := range g.Attributions {
			s += v
		}
		assert.InDelta(t, r.Completeness.Sum, s, 1e-12)
		assert.InDelta(t, r.Completeness.Expected, s, 1e-9) // Proposition 1
		require.NotNil(t, g.Completeness)
		assert.True(t, g.Completeness.OK)
		assert.InDelta(t, r.Completeness.Gap, g.Completeness.Gap, 1e-12)
	}
	assert.Equal(t, []string{"sky", "label 1", "road", "label 7"}, []string{labels[0].Name, labels[1].Name, labels[2].Name, labels[3].Name})
	assert.Equal(t, []int{2, 5, 9}, labels[0].Indices)
}

func TestGridGroups(t *testing.T) {
	// A 2 × 5 × 4 image in 2 × 3 patches: ⌈5/2⌉·⌈4/3⌉ = 6 patches, edge
	// patches cut to fit, every channel in each patch (row-major indices).
	g, err := GridGroups([]int{2, 5, 4}, 2, 3)
	require.NoError(t, err)
	require.Len(t, g, 6)
	assert.Equal(t, "patch 0,0", g[0].Name)
	assert.Equal(t, []int{0, 1, 2, 4, 5, 6, 20, 21, 22, 24, 25, 26}, g[0].Indices)
	assert.Equal(t, "patch 2,1", g[5].Name)
	assert.Equal(t, []int{19, 39}, g[5].Indices)
	cov, err := Cover(40, g)
	require.NoError(t, err)
	assert.True(t, cov.Partition())
	_, err = GridGroups([]int{4}, 2, 2)
	assert.ErrorIs(t, err, ErrInput)
	_, err = GridGroups([]int{4, 4}, 0, 2)
	assert.ErrorIs(t, err, ErrInput)
}

func TestCoverReportsOverlapAndGaps(t *testing.T) {
	groups := []Group{{"a", []int{0, 1}}, {"b", []int{1, 2, 4}}, {"c", []int{4, 5}}}
	cov, err := Cover(7, groups)
	require.NoError(t, err)
	assert.Equal(t, []int{1, 4}, cov.Overlapping)
	assert.Equal(t, []int{3, 6}, cov.Missing)
	assert.False(t, cov.Partition())
	attr := []float64{1, 2, 4, 8, 16, 32, 64}
	sums, err := GroupSum(attr, groups)
	require.NoError(t, err)
	assert.Equal(t, []float64{3, 22, 48}, sums) // by hand: 1+2, 2+4+16, 16+32
	r := &Result{Attributions: attr}
	g, err := r.Grouped(groups)
	require.NoError(t, err)
	assert.False(t, g.Partition)
	assert.Nil(t, g.Completeness)
	assert.Equal(t, []string{"a", "b", "c"}, g.Names)

	_, err = GroupSum(attr, []Group{{"x", []int{7}}})
	assert.ErrorIs(t, err, ErrInput)
	assert.ErrorContains(t, err, `group 0 ("x") has index 7, features are 0..6`)
	_, err = Cover(7, []Group{{"x", []int{-1}}})
	assert.ErrorIs(t, err, ErrInput)

	// An index listed twice in one group would count its feature twice in
	// the group's sum (Σ over a set counts each member once): refused by
	// both, and the group sums keep Σ attributions (completeness) intact.
	twice := []Group{{"a", []int{0, 0, 1}}}
	_, err = GroupSum(attr, twice)
	assert.ErrorIs(t, err, ErrInput)
	assert.ErrorContains(t, err, `group 0 ("a") lists index 0 twice`)
	_, err = Cover(7, twice)
	assert.ErrorContains(t, err, `group 0 ("a") lists index 0 twice`)
	_, err = FieldGroups([]string{"a"}, []int{0})
	assert.ErrorIs(t, err, ErrInput)
	_, err = FieldGroups([]string{"a"}, []int{1, 2})
	assert.ErrorIs(t, err, ErrInput)
}
