package main

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"sort"
	"strconv"
	"strings"

	"github.com/apportion/apportion/gradattr"
)

// defaultBlurSigma is the Gaussian σ, in pixels, of -baseline blur.
const defaultBlurSigma = 2.0

// baselineSpec resolves -baseline for integrated gradients.
func (c *explainConfig) baselineSpec(src *source) ([]gradattr.Baseline, error) {
	switch {
	case c.baseline == "zero":
		return []gradattr.Baseline{{Kind: gradattr.BaselineZero}}, nil
	case c.baseline == "mean":
		set := src.reference
		if set == nil {
			set = src.samples
		}
		rows := make([][]float64, set.Samples)
		for i := range rows {
			rows[i] = set.Sample(i)
			if err := finiteSample(rows[i]); err != nil {
				return nil, fmt.Errorf("-baseline mean: sample %d of %s: %w", i, set.Path, err)
			}
		}
		return []gradattr.Baseline{{Kind: gradattr.BaselineMean, Reference: rows}}, nil
	case c.baseline == "blur" || strings.HasPrefix(c.baseline, "blur:"):
		sigma := defaultBlurSigma
		if s, ok := strings.CutPrefix(c.baseline, "blur:"); ok {
			v, err := strconv.ParseFloat(s, 64)
			if err != nil || !(v > 0) {
				return nil, &usageErr{fmt.Sprintf("-baseline blur:S needs a positive σ in pixels, got %q", s)}
			}
			sigma = v
		}
		if len(src.samples.SampleShape()) < 2 {
			return nil, &usageErr{fmt.Sprintf("-baseline blur needs samples with at least two axes (height, width), got shape %s", shapeString(src.samples.SampleShape()))}
		}
		return []gradattr.Baseline{{Kind: gradattr.BaselineBlur, Sigma: sigma}}, nil
	}
	b, err := readInput(c.baseline, src.spec)
	if err != nil {
		return nil, fmt.Errorf("-baseline: %w", err)
	}
	if b.SampleSize() != src.samples.SampleSize() {
		return nil, fmt.Errorf("-baseline %s: expected samples of %d values, got %d", c.baseline, src.samples.SampleSize(), b.SampleSize())
	}
	out := make([]gradattr.Baseline, b.Samples)
	for i := range out {
		out[i] = gradattr.Baseline{Kind: gradattr.BaselineValues, Values: b.Sample(i)}
	}
	return out, nil
}

// referenceRows is the -reference set, one sample per row.
func referenceRows(src *source) ([][]float64, error) {
	set := src.reference
	if set == nil {
		return nil, nil
	}
	if set.SampleSize() != src.samples.SampleSize() {
		return nil, fmt.Errorf("-reference %s: expected samples of %d values, got %d", set.Path, src.samples.SampleSize(), set.SampleSize())
	}
	rows := make([][]float64, set.Samples)
	for i := range rows {
		rows[i] = set.Sample(i)
	}
	return rows, nil
}

// callMethod runs the selected method on sample x.
func (c *explainConfig) callMethod(ctx context.Context, src *source, x []float64, plan *methodPlan) (*gradattr.Result, error) {
	m := src.head
	switch c.method {
	case methodGrad:
		return gradattr.Gradient(ctx, m, x, c.target, gradattr.GradientOptions{})
	case methodGradInput:
		return gradattr.GradientTimesInput(ctx, m, x, c.target)
	case methodSmooth:
		return gradattr.SmoothGrad(ctx, m, x, c.target, gradattr.SmoothGradOptions{
			Samples: c.samples, Noise: c.noise, Seed: c.seed,
		})
	case methodIG:
		return gradattr.IntegratedGradients(ctx, m, x, c.target, gradattr.IGOptions{
			Rule: c.rule, Points: c.steps, Tolerance: c.tolerance, Baselines: plan.baselines,
		})
	case methodExpected:
		tol := c.tolerance
		if !c.toleranceSet {
			tol = 0 // the library's default for a method exact only in expectation
		}
		return gradattr.ExpectedGradients(ctx, m, x, c.target, gradattr.ExpectedGradientsOptions{
			Reference: plan.reference, Samples: c.samples, Seed: c.seed, Tolerance: tol,
		})
	}
	return nil, fmt.Errorf("unknown method %q", c.method)
}

// methodPlan is what the methods need beyond the sample, resolved once.
type methodPlan struct {
	baselines []gradattr.Baseline
	reference [][]float64
	groups    []gradattr.Group
}

func (c *explainConfig) plan(src *source) (*methodPlan, error) {
	p := &methodPlan{}
	var err error
	if c.method == methodIG {
		if p.baselines, err = c.baselineSpec(src); err != nil {
			return nil, err
		}
	}
	if p.reference, err = referenceRows(src); err != nil {
		return nil, err
	}
	if c.groups != "" {
		if p.groups, err = readGroups(c.groups); err != nil {
			return nil, err
		}
		if _, err := gradattr.Cover(src.samples.SampleSize(), p.groups); err != nil {
			return nil, fmt.Errorf("-groups %s: %w", c.groups, err)
		}
	}
	return p, nil
}

// readGroups reads a JSON array of {"name": "...", "indices": [...]}
// objects, or an object mapping each group name to its indices (groups then
// come in name order).
func readGroups(path string) ([]gradattr.Group, error) {
	raw, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("-groups: %w", err)
	}
	var list []gradattr.Group
	if err := json.Unmarshal(raw, &list); err == nil {
		for i, g := range list {
			if g.Name == "" {
				return nil, fmt.Errorf("-groups %s: group %d has no name", path, i)
			}
		}
		return list, nil
	}
	var byName map[string][]int
	if err := json.Unmarshal(raw, &byName); err != nil {
		return nil, fmt.Errorf("-groups %s: expected a JSON array of {\"name\", \"indices\"} objects or an object of name: [indices], got: %w", path, err)
	}
	names := make([]string, 0, len(byName))
	for n := range byName {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		list = append(list, gradattr.Group{Name: n, Indices: byName[n]})
	}
	return list, nil
}
