package main

import (
	"encoding/json"
	"fmt"
	"os"
	"sort"
	"strconv"
	"strings"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// checkParams refuses a method parameter given for a method that does not
// read it; it returns a usage message or "".
func (c *explainConfig) checkParams() string {
	for _, p := range []gradattr.Param{gradattr.ParamBaseline, gradattr.ParamReference, gradattr.ParamSteps,
		gradattr.ParamRule, gradattr.ParamTolerance, gradattr.ParamSamples, gradattr.ParamNoise, gradattr.ParamSeed} {
		if !c.set[string(p)] || c.method.Reads(p) {
			continue
		}
		var readers []string
		for _, m := range gradattr.Methods() {
			if m.Reads(p) {
				readers = append(readers, m.String())
			}
		}
		return fmt.Sprintf("-%s applies to -method %s only, not %s", p, strings.Join(readers, " and "), c.method)
	}
	return ""
}

// isMethod reports whether name names method m.
func isMethod(name string, m gradattr.Method) bool {
	got, err := gradattr.ParseMethod(name)
	return err == nil && got == m
}

// needsReference reports whether the method reads a reference set: expected
// gradients, and integrated gradients against the mean baseline.
func (c *explainConfig) needsReference() bool {
	return c.method == gradattr.MethodExpectedGradients ||
		(c.method == gradattr.MethodIntegratedGradients && c.baseline == "mean")
}

// defaultBlurSigma is the Gaussian σ, in pixels, of -baseline blur.
const defaultBlurSigma = 2.0

// baselineSpec resolves -baseline for integrated gradients: the mean
// baseline averages the reference set when there is one, else the samples
// themselves.
func (c *explainConfig) baselineSpec(src *source) ([]gradattr.Baseline, error) {
	switch {
	case c.baseline == "zero":
		return []gradattr.Baseline{{Kind: gradattr.BaselineZero}}, nil
	case c.baseline == "mean":
		if src.reference != nil {
			rows, err := referenceRows(src)
			return []gradattr.Baseline{{Kind: gradattr.BaselineMean, Reference: rows}}, err
		}
		set := src.samples
		rows := make([][]float64, set.Samples)
		for i := range rows {
			rows[i] = set.Sample(i)
			if err := samples.CheckFinite(rows[i]); err != nil {
				return nil, fmt.Errorf("-baseline mean: sample %d of %s: %w", i, set.Name, err)
			}
		}
		return []gradattr.Baseline{{Kind: gradattr.BaselineMean, Reference: rows, Source: set.Name}}, nil
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
			return nil, &usageErr{fmt.Sprintf("-baseline blur needs samples with at least two axes (height, width), got shape %s", samples.ShapeString(src.samples.SampleShape()))}
		}
		return []gradattr.Baseline{{Kind: gradattr.BaselineBlur, Sigma: sigma}}, nil
	}
	b, err := samples.ReadFile(c.baseline, src.spec, src.readOptions(false))
	if err != nil {
		return nil, fmt.Errorf("-baseline: %w", err)
	}
	if b.SampleSize() != src.samples.SampleSize() {
		return nil, fmt.Errorf("-baseline %s: expected samples of %d values, got %d", c.baseline, src.samples.SampleSize(), b.SampleSize())
	}
	out := make([]gradattr.Baseline, b.Samples)
	for i := range out {
		out[i] = gradattr.Baseline{Kind: gradattr.BaselineValues, Values: b.Sample(i), Source: c.baseline}
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
		return nil, fmt.Errorf("-reference %s: expected samples of %d values, got %d", set.Name, src.samples.SampleSize(), set.SampleSize())
	}
	rows := make([][]float64, set.Samples)
	for i := range rows {
		rows[i] = set.Sample(i)
	}
	return rows, nil
}

// methodPlan is what the methods need beyond the sample, resolved once.
type methodPlan struct {
	options gradattr.Options
	groups  []gradattr.Group
}

func (c *explainConfig) plan(src *source) (*methodPlan, error) {
	o := c.method.Defaults()
	// The flags' defaults are the methods' defaults, except -tolerance,
	// whose default is integrated gradients' alone.
	o.Points, o.Rule = c.steps, c.rule
	if c.set["tolerance"] {
		o.Tolerance = c.tolerance
	}
	o.Samples, o.Noise, o.Seed = c.samples, c.noise, c.seed
	var err error
	if c.method.Reads(gradattr.ParamBaseline) {
		if o.Baselines, err = c.baselineSpec(src); err != nil {
			return nil, err
		}
	}
	if o.Reference, err = referenceRows(src); err != nil {
		return nil, err
	}
	p := &methodPlan{options: o}
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
