package gradattr

import (
	"fmt"
	"math/rand/v2"
	"slices"
)

// DefaultForwardBatch is the number of rows the methods that only run the
// model forward send per call when their BatchSize is zero. Their rows are
// many and cheap, so a larger batch than DefaultBatchSize saves per-call
// overhead.
const DefaultForwardBatch = 512

// players are the units the perturbation methods switch on and off: each
// feature on its own, or the groups of a partition of the features.
type players struct {
	idx    [][]int // the features of each player
	groups []Group // nil when the players are the features
}

// newPlayers returns the players over size features: the features, or
// groups, which must partition them.
func newPlayers(size int, groups []Group) (*players, error) {
	if groups == nil {
		p := &players{idx: make([][]int, size)}
		flat := make([]int, size)
		for i := range flat {
			flat[i] = i
			p.idx[i] = flat[i : i+1 : i+1]
		}
		return p, nil
	}
	if len(groups) == 0 {
		return nil, fmt.Errorf("%w: no groups: want groups that partition the features, or none", ErrInput)
	}
	cov, err := Cover(size, groups)
	if err != nil {
		return nil, err
	}
	if !cov.Partition() {
		return nil, fmt.Errorf("%w: the groups must partition the features (each feature in exactly one group) to be switched on and off; %s",
			ErrInput, describeCoverage(cov))
	}
	p := &players{idx: make([][]int, len(groups)), groups: groups}
	for g, grp := range groups {
		if len(grp.Indices) == 0 {
			return nil, fmt.Errorf("%w: group %d (%q) has no features", ErrInput, g, grp.Name)
		}
		p.idx[g] = grp.Indices
	}
	return p, nil
}

// describeCoverage says which features a set of groups misses or repeats.
func describeCoverage(c Coverage) string {
	show := func(v []int) string {
		if len(v) > 5 {
			return fmt.Sprintf("%v and %d more", v[:5], len(v)-5)
		}
		return fmt.Sprint(v)
	}
	switch {
	case len(c.Missing) > 0 && len(c.Overlapping) > 0:
		return fmt.Sprintf("features %s are in no group and features %s in more than one", show(c.Missing), show(c.Overlapping))
	case len(c.Missing) > 0:
		return fmt.Sprintf("features %s are in no group", show(c.Missing))
	}
	return fmt.Sprintf("features %s are in more than one group", show(c.Overlapping))
}

func (p *players) n() int { return len(p.idx) }

// spread returns one value per feature from one value per player: a
// group's value divided evenly among its features, so that the features
// of a group sum to the group's value (nil for nil).
func (p *players) spread(v []float64, size int) []float64 {
	if v == nil {
		return nil
	}
	out := make([]float64, size)
	for q, idx := range p.idx {
		share := v[q]
		if p.groups != nil {
			share /= float64(len(idx))
		}
		for _, i := range idx {
			out[i] = share
		}
	}
	return out
}

// paint returns one value per feature from one value per player: each
// feature takes its player's value.
func (p *players) paint(v []float64, size int) []float64 {
	out := make([]float64, size)
	for q, idx := range p.idx {
		for _, i := range idx {
			out[i] = v[q]
		}
	}
	return out
}

// grouped is the record of values computed per group, when the players
// are groups: the values themselves, not sums of the per-feature ones;
// nil when the players are the features.
func (p *players) grouped(v, se []float64, c *Completeness) *GroupedResult {
	if p.groups == nil {
		return nil
	}
	names := make([]string, len(p.groups))
	for g, grp := range p.groups {
		names[g] = grp.Name
	}
	g := &GroupedResult{Names: names, Attributions: slices.Clone(v), StandardErrors: slices.Clone(se), Partition: true}
	if c != nil {
		g.Completeness = completeness(v, c.Expected, 0, c.Tolerance, c.Judged)
	}
	return g
}

// background checks the rows that players out of a coalition take their
// values from.
func (e *engine) checkBackground(what string, rows [][]float64) error {
	if len(rows) == 0 {
		return fmt.Errorf("%w: no %s rows", ErrInput, what)
	}
	for k, row := range rows {
		if err := checkSample(fmt.Sprintf("%s row %d", what, k), row, e.shape, e.size); err != nil {
			return err
		}
	}
	return nil
}

// checkRows refuses a request of more than MaxEvaluations values of model
// input (rows × features) before any of it runs.
func (e *engine) checkRows(what string, rows int) error {
	if rows < 0 || rows > MaxEvaluations/e.size {
		return fmt.Errorf("%w: %s: %d model rows × %d features exceeds %d input values", ErrOptions, what, rows, e.size, MaxEvaluations)
	}
	return nil
}

// meanOutputs returns the mean of the model's outputs over rows, all of
// them, summed in row order.
func (e *engine) meanOutputs(rows [][]float64) ([]float64, error) {
	mean := make([]float64, e.nout)
	err := e.forward(len(rows), func(k int, dst []float64) { copy(dst, rows[k]) },
		func(_ int, out []float64) {
			for j, v := range out {
				mean[j] += v
			}
		})
	if err != nil {
		return nil, err
	}
	for j := range mean {
		mean[j] /= float64(len(rows))
	}
	return mean, nil
}

// coalitionValues returns, for coalitions c = 0..n−1,
//
//	v(S_c) = (1/K) Σ_k f(x_{S_c}, b_k)[target]
//
// the target output with the players of S_c at the sample's values and the
// others at background row b_k, averaged over the K background rows.
// members(c, on) marks the players of coalition c in on (cleared before).
// The rows go to the model coalition by coalition, each coalition's K rows
// in background order, so every value is the same sum whatever the batch
// size.
func (e *engine) coalitionValues(p *players, bg [][]float64, n int, members func(c int, on []bool)) ([]float64, error) {
	k := len(bg)
	on := make([]bool, p.n())
	vals := make([]float64, n)
	fill := func(i int, dst []float64) {
		c, r := i/k, i%k
		if r == 0 {
			clear(on)
			members(c, on)
		}
		copy(dst, bg[r])
		for q, in := range on {
			if in {
				for _, j := range p.idx[q] {
					dst[j] = e.x[j]
				}
			}
		}
	}
	use := func(i int, out []float64) { vals[i/k] += out[e.target] }
	if err := e.forward(n*k, fill, use); err != nil {
		return nil, err
	}
	for c := range vals {
		vals[c] /= float64(k)
	}
	return vals, nil
}

// forwardBatch is the batch size of the perturbation methods: batch, or
// DefaultForwardBatch for 0.
func forwardBatch(batch int) int {
	if batch == 0 {
		return DefaultForwardBatch
	}
	return batch
}

// countOption returns the count n of an option called what: def for 0,
// else n when it is in lo..hi, else an ErrOptions error.
func countOption(what string, n, def, lo, hi int) (int, error) {
	switch {
	case n == 0:
		return def, nil
	case n < lo || n > hi:
		return 0, fmt.Errorf("%w: %s %d, want 0 (default %d) or %d..%d", ErrOptions, what, n, def, lo, hi)
	}
	return n, nil
}

// sampleRows returns the rows of ref that Shapley values average over: all
// of them, in order, when k ≥ len(ref); otherwise k of them drawn without
// replacement (a partial Fisher–Yates shuffle of the indices from
// math/rand/v2's PCG seeded by (seed, 3)), kept in their order in ref.
func sampleRows(ref [][]float64, k int, seed uint64) [][]float64 {
	if k >= len(ref) {
		return ref
	}
	rng := rand.New(rand.NewPCG(seed, 3))
	idx := make([]int, len(ref))
	for i := range idx {
		idx[i] = i
	}
	for i := 0; i < k; i++ {
		j := i + rng.IntN(len(idx)-i)
		idx[i], idx[j] = idx[j], idx[i]
	}
	pick := idx[:k]
	slices.Sort(pick)
	out := make([][]float64, k)
	for i, j := range pick {
		out[i] = ref[j]
	}
	return out
}
