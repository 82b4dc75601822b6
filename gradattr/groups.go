package gradattr

import (
	"fmt"
	"slices"
)

// Group is a named set of feature indices (row-major positions in the
// input) whose attributions are reported together: the fields of a one-hot
// encoding, the pixels of an image patch, the pixels of a segment.
type Group struct {
	Name    string `json:"name"`
	Indices []int  `json:"indices"`
}

// GroupSum returns, for each group, the sum of attr over its indices. An
// index outside [0, len(attr)) is an error wrapping ErrInput. Because
// attributions are additive, when the groups partition the features (see
// Cover) the group sums add up to Σ attr, so a completeness check on the
// features holds for the groups too.
func GroupSum(attr []float64, groups []Group) ([]float64, error) {
	sums := make([]float64, len(groups))
	for g, grp := range groups {
		for _, i := range grp.Indices {
			if i < 0 || i >= len(attr) {
				return nil, fmt.Errorf("%w: group %d (%q) has index %d, features are 0..%d", ErrInput, g, grp.Name, i, len(attr)-1)
			}
			sums[g] += attr[i]
		}
	}
	return sums, nil
}

// Coverage tells how a set of groups covers n features.
type Coverage struct {
	// Overlapping lists, in increasing order, the features in more than
	// one group (or listed twice in one).
	Overlapping []int `json:"overlapping,omitempty"`
	// Missing lists, in increasing order, the features in no group.
	Missing []int `json:"missing,omitempty"`
}

// Partition reports whether every feature is in exactly one group.
func (c Coverage) Partition() bool { return len(c.Overlapping) == 0 && len(c.Missing) == 0 }

// Cover checks how groups cover features 0..n−1; an index out of range is an
// error wrapping ErrInput.
func Cover(n int, groups []Group) (Coverage, error) {
	if n < 0 {
		return Coverage{}, fmt.Errorf("%w: %d features", ErrInput, n)
	}
	count := make([]int, n)
	for g, grp := range groups {
		for _, i := range grp.Indices {
			if i < 0 || i >= n {
				return Coverage{}, fmt.Errorf("%w: group %d (%q) has index %d, features are 0..%d", ErrInput, g, grp.Name, i, n-1)
			}
			count[i]++
		}
	}
	var c Coverage
	for i, k := range count {
		switch {
		case k == 0:
			c.Missing = append(c.Missing, i)
		case k > 1:
			c.Overlapping = append(c.Overlapping, i)
		}
	}
	return c, nil
}

// GroupedResult is a Result summed over groups.
type GroupedResult struct {
	// Names and Attributions hold one entry per group, in group order.
	Names        []string  `json:"names"`
	Attributions []float64 `json:"attributions"`
	// Coverage reports overlapping and missing features.
	Coverage Coverage `json:"coverage"`
	// Partition is Coverage.Partition(): only then do the group sums add
	// up to the feature sum, and the Result's completeness carries over.
	Partition bool `json:"partition"`
	// Completeness is the Result's check redone on the group sums (same
	// expected value and tolerance); nil when the Result has none or the
	// groups do not partition the features.
	Completeness *Completeness `json:"completeness,omitempty"`
	// StandardErrors holds the standard error of each group's value, when
	// a sampling method computed the values per group (see Result.Groups).
	StandardErrors []float64 `json:"standard_errors,omitempty"`
	// Segments is the superpixel label map the groups came from, when they
	// did: the segment of each pixel, row-major over height × width.
	Segments []int `json:"segments,omitempty"`
}

// Grouped sums r's attributions over groups and reports whether they
// partition the features.
func (r *Result) Grouped(groups []Group) (*GroupedResult, error) {
	sums, err := GroupSum(r.Attributions, groups)
	if err != nil {
		return nil, err
	}
	cov, err := Cover(len(r.Attributions), groups)
	if err != nil {
		return nil, err
	}
	names := make([]string, len(groups))
	for g, grp := range groups {
		names[g] = grp.Name
	}
	g := &GroupedResult{Names: names, Attributions: sums, Coverage: cov, Partition: cov.Partition()}
	if c := r.Completeness; c != nil && g.Partition {
		g.Completeness = completeness(sums, c.Expected, 0, c.Tolerance, c.Judged)
	}
	return g, nil
}

// FieldGroups groups consecutive features into fields, as a tabular encoder
// lays out one-hot (or other multi-column) fields: field k covers widths[k]
// features starting where field k−1 ended. names[k] names field k. The
// widths must be ≥ 1 and len(names) = len(widths).
func FieldGroups(names []string, widths []int) ([]Group, error) {
	if len(names) != len(widths) {
		return nil, fmt.Errorf("%w: %d field names for %d widths", ErrInput, len(names), len(widths))
	}
	groups := make([]Group, len(widths))
	at := 0
	for k, w := range widths {
		if w < 1 {
			return nil, fmt.Errorf("%w: field %d (%q) has width %d, want ≥ 1", ErrInput, k, names[k], w)
		}
		idx := make([]int, w)
		for j := range idx {
			idx[j] = at + j
		}
		at += w
		groups[k] = Group{Name: names[k], Indices: idx}
	}
	return groups, nil
}

// GridGroups tiles the last two axes (height, width) of shape with patches
// of ph×pw pixels, row by row; patches at the right and bottom edges are
// cut to fit. A patch holds its pixels in every leading axis (all channels).
// Patch (r, c), the r-th from the top and c-th from the left, is named
// "patch r,c".
func GridGroups(shape []int, ph, pw int) ([]Group, error) {
	if len(shape) < 2 {
		return nil, fmt.Errorf("%w: grid needs at least two axes (height, width), got shape %v", ErrInput, shape)
	}
	size, err := shapeSize(shape)
	if err != nil {
		return nil, fmt.Errorf("%w: %w", ErrInput, err)
	}
	if ph < 1 || pw < 1 {
		return nil, fmt.Errorf("%w: patch %d×%d, want at least 1×1", ErrInput, ph, pw)
	}
	h, w := shape[len(shape)-2], shape[len(shape)-1]
	planes := size / (h * w)
	var groups []Group
	for r := 0; r*ph < h; r++ {
		for c := 0; c*pw < w; c++ {
			var idx []int
			for p := 0; p < planes; p++ {
				for y := r * ph; y < min(h, (r+1)*ph); y++ {
					for x := c * pw; x < min(w, (c+1)*pw); x++ {
						idx = append(idx, p*h*w+y*w+x)
					}
				}
			}
			groups = append(groups, Group{Name: fmt.Sprintf("patch %d,%d", r, c), Indices: idx})
		}
	}
	return groups, nil
}

// LabelGroups groups features by label: feature i belongs to the group of
// labels[i] (a segmentation map, a feature-to-field table). Groups come in
// increasing label order and are named names[label], or "label N" when the
// map has no name for it.
func LabelGroups(labels []int, names map[int]string) []Group {
	byLabel := map[int][]int{}
	for i, l := range labels {
		byLabel[l] = append(byLabel[l], i)
	}
	keys := make([]int, 0, len(byLabel))
	for l := range byLabel {
		keys = append(keys, l)
	}
	slices.Sort(keys)
	groups := make([]Group, len(keys))
	for g, l := range keys {
		name, ok := names[l]
		if !ok {
			name = fmt.Sprintf("label %d", l)
		}
		groups[g] = Group{Name: name, Indices: byLabel[l]}
	}
	return groups
}
