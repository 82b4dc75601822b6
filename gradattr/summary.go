package gradattr

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"slices"
	"sort"
	"strconv"
	"strings"
)

// Summary defaults and limits.
const (
	// DefaultBootstrap is the number B of Poisson bootstrap replicates a
	// Summary keeps when SummaryOptions.Bootstrap is zero.
	DefaultBootstrap = 200
	// MaxBootstrap bounds SummaryOptions.Bootstrap.
	MaxBootstrap = 100_000
	// MaxSummaryCells bounds features × replicates: each group keeps two
	// exact sums per cell.
	MaxSummaryCells = 1 << 22
	// MaxSummaryGroups bounds the number of distinct subgroups, so that a
	// key column with one value per row (an identifier) is refused instead
	// of exhausting memory.
	MaxSummaryGroups = 1024
	// MaxSummaryTotalCells bounds features × replicates × (groups + 1),
	// the cells of all groups and of the whole together (about 50 bytes
	// each, more once sums carry low-order parts).
	MaxSummaryTotalCells = 1 << 23
	// MaxSkippedKept is the number of skipped rows whose error a Summary
	// keeps (those with the smallest keys); all are counted.
	MaxSkippedKept = 1000
	// MaxSummaryValue bounds |a| of an attribution added to a Summary, so
	// that a² and the sums of up to 2^53 rows stay finite.
	MaxSummaryValue = 1e100
)

// Summary document identification, in the "format" and "version" keys.
const (
	SummaryFormat  = "apportion-summary"
	SummaryVersion = 1
)

// SummaryConfidence is the level of the bootstrap intervals: the 2.5% and
// 97.5% percentiles of the replicate means.
const SummaryConfidence = 0.95

// ErrMismatch reports two summaries that cannot be merged: of different
// models, methods, settings, features, grouping or bootstrap, or sharing a
// row key. Errors wrapping it wrap ErrInput too.
var ErrMismatch = errors.New("gradattr: summaries do not match")

// MismatchError says why two summaries cannot be merged. It wraps
// ErrMismatch and ErrInput.
type MismatchError struct {
	// What is what differs: "model", "method", "settings", "features",
	// "grouped by", "bootstrap replicates", "bootstrap seed", or "row key"
	// when both summaries hold a row.
	What string
	// A and B are the two summaries' values of What; for "row key", A is
	// the first key both hold.
	A, B string
}

func (e *MismatchError) Error() string {
	if e.What == "row key" {
		return ErrMismatch.Error() + ": both summaries hold row key " + e.A
	}
	return ErrMismatch.Error() + ": " + e.What + " " + e.A + " vs " + e.B
}

// Is reports ErrMismatch and ErrInput.
func (e *MismatchError) Is(target error) bool { return target == ErrMismatch || target == ErrInput }

// SummaryOptions describes what a Summary summarises. Two summaries merge
// only when their options are equal (Settings compared as JSON values).
// The zero value of Bootstrap and Seed means 200 replicates from seed 0;
// Features is required.
type SummaryOptions struct {
	// Features names the features, in attribution order.
	Features []string
	// Model identifies the model, e.g. the hex SHA-256 of its file.
	Model string
	// Method is the attribution method.
	Method Method
	// Settings are the method settings the attributions were computed
	// with; they must marshal to a JSON object (or be nil).
	Settings map[string]any
	// GroupBy names what the subgroup keys are (a column name, or
	// "predicted"); "" when rows are not grouped.
	GroupBy string
	// Bootstrap is the number B of replicates; 0 means DefaultBootstrap.
	Bootstrap int
	// Seed seeds the replicate weights (see Summary).
	Seed uint64
}

// Summary aggregates many local explanations (one attribution vector per
// row) into per-feature statistics, over all rows and per subgroup: the
// row count, Σ|a_i|, Σa_i, Σa_i², and the same weighted sums for B Poisson
// bootstrap replicates.
//
// Replicate b gives row r the weight w_rb ~ Poisson(1), drawn from
// math/rand/v2's PCG seeded by (Seed, key_r) where key_r is the row's
// global key (its index in the whole data set), so the weight depends on
// the row alone and not on which shard it was summarised in (Hanley &
// MacGibbon 2006, "Creating non-parametric bootstrap samples using Poisson
// frequencies"; Chamandy, Muralidharan, Najmi & Naidu 2012, "Estimating
// uncertainty for massive data streams", Google; both from memory). The
// replicate mean of feature i is
//
//	m_ib = Σ_r w_rb · a_ri / Σ_r w_rb
//
// and the 95% interval is the 2.5% and 97.5% percentiles of m_i1..m_iB
// (the percentile interval of Efron & Tibshirani 1993, ch. 13, from
// memory), over the replicates with Σ_r w_rb > 0; the same for |a_ri|.
//
// All sums are kept exactly: floating-point expansions (Shewchuk 1997,
// "Adaptive precision floating-point arithmetic and fast robust geometric
// predicates", the grow-expansion algorithm) accumulate each a, |a|, fl(a²)
// and the exact products w·a (the rounded product plus its FMA residual),
// and every reported sum is the exact sum rounded once to the nearest
// float64. Merging adds the expansions, so a merged summary equals,
// bit for bit, the summary of all its rows added to one Summary, in any
// order and any split.
//
// Each row key may enter a summary once (added or skipped); merging
// summaries that share a key is refused. A Summary is not safe for
// concurrent use.
type Summary struct {
	opt      SummaryOptions
	settings []byte // canonical JSON of opt.Settings
	nf       int
	b        int

	rowLedger
	all    *accum
	groups map[string]*accum
}

// rowLedger records the row keys a summary holds, the rows it skipped and
// how many of the rows summed failed their completeness check.
type rowLedger struct {
	keys       []keyRange
	skipped    []SkippedRow
	nskip      int
	incomplete int64
}

// skip takes key for a row that failed with reason: counted (its message
// kept, up to MaxSkippedKept), not summed.
func (l *rowLedger) skip(key uint64, group string, reason error) error {
	if !l.takeKey(key) {
		return fmt.Errorf("%w: row key %d is already in the summary", ErrInput, key)
	}
	msg := "unknown error"
	if reason != nil {
		msg = reason.Error()
	}
	l.nskip++
	l.skipped = appendSkipped(l.skipped, SkippedRow{Key: key, Group: group, Error: msg})
	return nil
}

// absorb adds o's skipped rows and takes keys, o's merged with l's (see
// mergeKeys).
func (l *rowLedger) absorb(o *rowLedger, keys []keyRange) {
	l.keys = keys
	l.nskip += o.nskip
	l.incomplete += o.incomplete
	for _, r := range o.skipped {
		l.skipped = appendSkipped(l.skipped, r)
	}
}

// keysJSON lists the key ranges as [lo, hi) pairs.
func (l *rowLedger) keysJSON() [][2]uint64 {
	out := make([][2]uint64, len(l.keys))
	for i, k := range l.keys {
		out[i] = [2]uint64{k.Lo, k.Hi}
	}
	return out
}

// readLedger checks and reads the keys, the skipped rows and the count of
// incomplete rows of a summary document of rows rows.
func readLedger(keys [][2]uint64, skipped []SkippedRow, nskip int, rows, incomplete int64) (rowLedger, error) {
	var l rowLedger
	if incomplete < 0 || incomplete > rows {
		return l, fmt.Errorf("%w: summary JSON: %d incomplete rows, expected 0 to the %d rows summed", ErrInput, incomplete, rows)
	}
	l.incomplete = incomplete
	var prev, n uint64
	for i, k := range keys {
		if k[0] >= k[1] || (i > 0 && k[0] <= prev) {
			return l, fmt.Errorf("%w: summary JSON: keys: range %d [%d, %d) is empty or not after the previous one", ErrInput, i, k[0], k[1])
		}
		prev = k[1]
		n += k[1] - k[0]
		l.keys = append(l.keys, keyRange{k[0], k[1]})
	}
	if nskip < len(skipped) || nskip < 0 {
		return l, fmt.Errorf("%w: summary JSON: inconsistent counts: skipped %d with %d listed", ErrInput, nskip, len(skipped))
	}
	if n != uint64(rows)+uint64(nskip) {
		return l, fmt.Errorf("%w: summary JSON: keys cover %d rows, expected rows + skipped = %d", ErrInput, n, rows+int64(nskip))
	}
	l.nskip = nskip
	for _, r := range skipped {
		l.skipped = appendSkipped(l.skipped, r)
	}
	return l, nil
}

// SkippedRow is a row whose explanation failed; it is counted, not summed.
type SkippedRow struct {
	Key   uint64 `json:"key"`
	Group string `json:"group,omitempty"`
	Error string `json:"error"`
}

// keyRange is the half-open key interval [Lo, Hi).
type keyRange struct{ Lo, Hi uint64 }

// accum holds the sums of one group.
type accum struct {
	rows               int64
	sumAbs, sum, sumSq []expansion // per feature
	bootCount          []int64     // per replicate: Σ w
	bootAbs, bootSum   []expansion // feature*B + b
}

// NewSummary returns an empty summary. Errors wrap ErrOptions.
func NewSummary(opt SummaryOptions) (*Summary, error) {
	if len(opt.Features) == 0 {
		return nil, fmt.Errorf("%w: summary needs the feature names, got none", ErrOptions)
	}
	switch {
	case opt.Bootstrap == 0:
		opt.Bootstrap = DefaultBootstrap
	case opt.Bootstrap < 0 || opt.Bootstrap > MaxBootstrap:
		return nil, fmt.Errorf("%w: bootstrap replicates %d, want 0 (default %d) or 1..%d", ErrOptions, opt.Bootstrap, DefaultBootstrap, MaxBootstrap)
	}
	if cells := len(opt.Features) * opt.Bootstrap; cells > MaxSummaryCells {
		return nil, fmt.Errorf("%w: %d features × %d replicates = %d cells, more than the %d a summary may keep", ErrOptions, len(opt.Features), opt.Bootstrap, cells, MaxSummaryCells)
	}
	settings, err := canonicalJSON(opt.Settings)
	if err != nil {
		return nil, fmt.Errorf("%w: summary settings: %v", ErrOptions, err)
	}
	opt.Features = slices.Clone(opt.Features)
	s := &Summary{opt: opt, settings: settings, nf: len(opt.Features), b: opt.Bootstrap, groups: map[string]*accum{}}
	s.all = s.newAccum()
	return s, nil
}

// Options returns the summary's options, defaults filled in.
func (s *Summary) Options() SummaryOptions {
	o := s.opt
	o.Features = slices.Clone(o.Features)
	return o
}

func (s *Summary) newAccum() *accum {
	return &accum{
		sumAbs: make([]expansion, s.nf), sum: make([]expansion, s.nf), sumSq: make([]expansion, s.nf),
		bootCount: make([]int64, s.b),
		bootAbs:   make([]expansion, s.nf*s.b), bootSum: make([]expansion, s.nf*s.b),
	}
}

// Add sums the attributions attr of the row with the given key into the
// whole and into subgroup group ("" for none). A row of the wrong length,
// with a NaN, an infinity or a value beyond MaxSummaryValue, or a key
// already in the summary, is refused with an error wrapping ErrInput and
// changes nothing.
func (s *Summary) Add(key uint64, group string, attr []float64) error {
	if err := s.Check(key, attr); err != nil {
		return err
	}
	g, err := s.reserve(key, group)
	if err != nil {
		return err
	}
	w := poissonWeights(s.opt.Seed, key, s.b)
	s.all.add(attr, w, s.b)
	if g != nil {
		g.add(attr, w, s.b)
	}
	return nil
}

// AddIncomplete is Add for a row whose completeness check was judged and
// failed (Completeness.OK false): its attributions are summed like any
// other row's, and it is counted in IncompleteRows, so that a summary says
// how many of its rows do not add up to their output's change.
func (s *Summary) AddIncomplete(key uint64, group string, attr []float64) error {
	if err := s.Add(key, group, attr); err != nil {
		return err
	}
	s.incomplete++
	return nil
}

// Check returns the error Add refuses the attributions attr of the row
// with the given key with, for their length or a value (not for the key
// or the group), or nil. It lets a caller that adds rows elsewhere (a
// pipeline's combine) set such a row aside first.
func (s *Summary) Check(key uint64, attr []float64) error {
	if len(attr) != s.nf {
		return fmt.Errorf("%w: row %d has %d attributions, summary has %d features", ErrInput, key, len(attr), s.nf)
	}
	for i, a := range attr {
		if math.IsNaN(a) || math.Abs(a) > MaxSummaryValue {
			return fmt.Errorf("%w: row %d, feature %d (%s): attribution %v, want a finite number of magnitude ≤ %g", ErrInput, key, i, s.opt.Features[i], a, MaxSummaryValue)
		}
	}
	return nil
}

// Skip records that the row with the given key failed with reason. It is
// counted (and its message kept, up to MaxSkippedKept) but not summed.
func (s *Summary) Skip(key uint64, group string, reason error) error {
	return s.skip(key, group, reason)
}

// reserve checks the group limit and takes the key; it returns the group's
// accumulator (nil for group "").
func (s *Summary) reserve(key uint64, group string) (*accum, error) {
	var g *accum
	if group != "" {
		g = s.groups[group]
		if g == nil {
			if err := s.checkGroups(len(s.groups) + 1); err != nil {
				return nil, fmt.Errorf("%w: row %d: group %q: %w", ErrInput, key, group, err)
			}
		}
	}
	if !s.takeKey(key) {
		return nil, fmt.Errorf("%w: row key %d is already in the summary", ErrInput, key)
	}
	if group != "" && g == nil {
		g = s.newAccum()
		s.groups[group] = g
	}
	return g, nil
}

// checkGroups returns an error when a summary of n groups would exceed
// MaxSummaryGroups or MaxSummaryTotalCells.
func (s *Summary) checkGroups(n int) error {
	if n > MaxSummaryGroups {
		return fmt.Errorf("%d groups, more than the %d a summary may keep", n, MaxSummaryGroups)
	}
	if cells := s.nf * s.b * (n + 1); cells > MaxSummaryTotalCells {
		return fmt.Errorf("%d groups of %d features × %d replicates, %d cells with the whole, more than the %d a summary may keep", n, s.nf, s.b, cells, MaxSummaryTotalCells)
	}
	return nil
}

func appendSkipped(list []SkippedRow, r SkippedRow) []SkippedRow {
	i := sort.Search(len(list), func(i int) bool { return list[i].Key >= r.Key })
	if i >= MaxSkippedKept {
		return list
	}
	list = slices.Insert(list, i, r)
	if len(list) > MaxSkippedKept {
		list = list[:MaxSkippedKept]
	}
	return list
}

// takeKey adds key to the key set; false when it is there already.
func (s *rowLedger) takeKey(key uint64) bool {
	i := sort.Search(len(s.keys), func(i int) bool { return s.keys[i].Hi > key })
	if i < len(s.keys) && s.keys[i].Lo <= key {
		return false
	}
	// Extend a neighbour or insert [key, key+1).
	left := i > 0 && s.keys[i-1].Hi == key
	right := i < len(s.keys) && key != math.MaxUint64 && s.keys[i].Lo == key+1
	switch {
	case left && right:
		s.keys[i-1].Hi = s.keys[i].Hi
		s.keys = slices.Delete(s.keys, i, i+1)
	case left:
		s.keys[i-1].Hi = key + 1
	case right:
		s.keys[i].Lo = key
	default:
		s.keys = slices.Insert(s.keys, i, keyRange{key, key + 1})
	}
	return true
}

func (g *accum) add(attr []float64, w []float64, nb int) {
	g.rows++
	for i, a := range attr {
		abs := math.Abs(a)
		g.sumAbs[i].add(abs)
		g.sum[i].add(a)
		g.sumSq[i].add(a * a)
	}
	for b, wb := range w {
		if wb == 0 {
			continue
		}
		g.bootCount[b] += int64(wb)
		for i, a := range attr {
			g.bootAbs[i*nb+b].addProduct(wb, math.Abs(a))
			g.bootSum[i*nb+b].addProduct(wb, a)
		}
	}
}

func (g *accum) merge(o *accum) {
	g.rows += o.rows
	for i := range g.sumAbs {
		g.sumAbs[i].addAll(o.sumAbs[i])
		g.sum[i].addAll(o.sum[i])
		g.sumSq[i].addAll(o.sumSq[i])
	}
	for b := range g.bootCount {
		g.bootCount[b] += o.bootCount[b]
	}
	for k := range g.bootAbs {
		g.bootAbs[k].addAll(o.bootAbs[k])
		g.bootSum[k].addAll(o.bootSum[k])
	}
}

// poisson1CDF[k] is P(K ≤ k) for K ~ Poisson(1): e^−1 Σ_{j≤k} 1/j!.
var poisson1CDF = func() []float64 {
	cdf := make([]float64, 20)
	p, c := math.Exp(-1), 0.0
	for k := range cdf {
		if k > 0 {
			p /= float64(k)
		}
		c += p
		cdf[k] = c
	}
	return cdf
}()

// poissonWeights draws the B replicate weights of one row: w_b ~ Poisson(1)
// by inversion of the CDF with one uniform u each (sequential search;
// Devroye 1986, "Non-Uniform Random Variate Generation", §X.3, from
// memory), from PCG(seed, key).
func poissonWeights(seed, key uint64, nb int) []float64 {
	rng := rand.New(rand.NewPCG(seed, key))
	w := make([]float64, nb)
	for b := range w {
		u := rng.Float64()
		k := 0
		for k < len(poisson1CDF)-1 && u >= poisson1CDF[k] {
			k++
		}
		w[b] = float64(k)
	}
	return w
}

// Merge adds the rows of o to s. It refuses, with an error wrapping
// ErrMismatch and ErrInput and leaving s unchanged, summaries whose options
// differ or whose row keys overlap.
func (s *Summary) Merge(o *Summary) error {
	if o == nil {
		return &MismatchError{What: "summary", A: "a summary", B: "none"}
	}
	if err := s.compatible(o); err != nil {
		return err
	}
	newGroups := 0
	for name := range o.groups {
		if s.groups[name] == nil {
			newGroups++
		}
	}
	if err := s.checkGroups(len(s.groups) + newGroups); err != nil {
		return fmt.Errorf("%w: merged summary: %w", ErrInput, err)
	}
	keys, err := mergeKeys(s.keys, o.keys)
	if err != nil {
		return err
	}
	s.absorb(&o.rowLedger, keys)
	s.all.merge(o.all)
	for name, g := range o.groups {
		mine := s.groups[name]
		if mine == nil {
			mine = s.newAccum()
			s.groups[name] = mine
		}
		mine.merge(g)
	}
	return nil
}

func (s *Summary) compatible(o *Summary) error {
	mismatch := func(what string, a, b any) error {
		return &MismatchError{What: what, A: fmt.Sprint(a), B: fmt.Sprint(b)}
	}
	switch {
	case s.opt.Model != o.opt.Model:
		return mismatch("model", short(s.opt.Model), short(o.opt.Model))
	case s.opt.Method != o.opt.Method:
		return mismatch("method", s.opt.Method, o.opt.Method)
	case !bytes.Equal(s.settings, o.settings):
		return mismatch("settings", string(s.settings), string(o.settings))
	case !slices.Equal(s.opt.Features, o.opt.Features):
		return mismatch("features", "["+strings.Join(s.opt.Features, " ")+"]", "["+strings.Join(o.opt.Features, " ")+"]")
	case s.opt.GroupBy != o.opt.GroupBy:
		return mismatch("grouped by", fmt.Sprintf("%q", s.opt.GroupBy), fmt.Sprintf("%q", o.opt.GroupBy))
	case s.b != o.b:
		return mismatch("bootstrap replicates", s.b, o.b)
	case s.opt.Seed != o.opt.Seed:
		return mismatch("bootstrap seed", s.opt.Seed, o.opt.Seed)
	}
	return nil
}

func short(h string) string {
	if len(h) > 12 {
		return h[:12] + "…"
	}
	if h == "" {
		return `""`
	}
	return h
}

// mergeKeys unites two sorted disjoint range lists, refusing overlap.
func mergeKeys(a, b []keyRange) ([]keyRange, error) {
	all := append(slices.Clone(a), b...)
	sort.Slice(all, func(i, j int) bool { return all[i].Lo < all[j].Lo })
	var out []keyRange
	for _, r := range all {
		if n := len(out); n > 0 && r.Lo < out[n-1].Hi {
			return nil, &MismatchError{What: "row key", A: strconv.FormatUint(r.Lo, 10)}
		}
		if n := len(out); n > 0 && r.Lo == out[n-1].Hi {
			out[n-1].Hi = r.Hi
			continue
		}
		out = append(out, r)
	}
	return out, nil
}

// Rows returns the number of rows summed (skipped rows excluded).
func (s *Summary) Rows() int { return int(s.all.rows) }

// SkippedRows returns the number of skipped rows.
func (s *Summary) SkippedRows() int { return s.nskip }

// IncompleteRows returns the number of rows summed whose completeness
// check failed (see AddIncomplete).
func (s *Summary) IncompleteRows() int { return int(s.incomplete) }

// Skipped returns the skipped rows kept, in key order (at most
// MaxSkippedKept; SkippedRows counts them all).
func (s *Summary) Skipped() []SkippedRow { return slices.Clone(s.skipped) }

// FeatureStats are the statistics of one feature's attributions in one
// group of n rows:
//
//	mean_abs = (1/n) Σ_r |a_r|     mean = (1/n) Σ_r a_r
//	sd       = √((Σ_r a_r² − n·mean²) / (n − 1))   (0 for n = 1)
//
// with 95% percentile bootstrap intervals [lo, hi] for both means (see
// Summary).
type FeatureStats struct {
	Feature   string  `json:"feature"`
	Index     int     `json:"index"`
	MeanAbs   float64 `json:"mean_abs"`
	MeanAbsLo float64 `json:"mean_abs_lo"`
	MeanAbsHi float64 `json:"mean_abs_hi"`
	Mean      float64 `json:"mean"`
	MeanLo    float64 `json:"mean_lo"`
	MeanHi    float64 `json:"mean_hi"`
	SD        float64 `json:"sd"`
}

// GroupStats are the statistics of one group (or of all rows).
type GroupStats struct {
	// Name is the group's key; "" for all rows.
	Name string `json:"name"`
	// Rows is the number of rows summed.
	Rows int `json:"rows"`
	// Replicates is the number of bootstrap replicates with a positive
	// total weight, from which the intervals are taken.
	Replicates int `json:"replicates"`
	// Features holds one entry per feature, in feature order (empty when
	// Rows is 0).
	Features []FeatureStats `json:"features"`
}

// Ranked returns the features ordered by decreasing mean |attribution|
// (ties in feature order).
func (g GroupStats) Ranked() []FeatureStats {
	out := slices.Clone(g.Features)
	sort.SliceStable(out, func(i, j int) bool { return out[i].MeanAbs > out[j].MeanAbs })
	return out
}

// Overall returns the statistics over all rows summed.
func (s *Summary) Overall() GroupStats { return s.stats("", s.all) }

// Groups returns the statistics of each subgroup, in increasing order of
// name.
func (s *Summary) Groups() []GroupStats {
	out := make([]GroupStats, 0, len(s.groups))
	for _, name := range s.groupNames() {
		out = append(out, s.stats(name, s.groups[name]))
	}
	return out
}

func (s *Summary) groupNames() []string {
	names := make([]string, 0, len(s.groups))
	for n := range s.groups {
		names = append(names, n)
	}
	sort.Strings(names)
	return names
}

func (s *Summary) stats(name string, g *accum) GroupStats {
	gs := GroupStats{Name: name, Rows: int(g.rows), Features: []FeatureStats{}}
	if g.rows == 0 {
		return gs
	}
	n := float64(g.rows)
	var live []int
	for b, c := range g.bootCount {
		if c > 0 {
			live = append(live, b)
		}
	}
	gs.Replicates = len(live)
	ma := make([]float64, len(live))
	ms := make([]float64, len(live))
	for i, f := range s.opt.Features {
		st := FeatureStats{Feature: f, Index: i}
		sa, ss, sq := g.sumAbs[i].value(), g.sum[i].value(), g.sumSq[i].value()
		st.MeanAbs, st.Mean = sa/n, ss/n
		if g.rows > 1 {
			st.SD = math.Sqrt(math.Max(0, (sq-n*st.Mean*st.Mean)/(n-1)))
		}
		for k, b := range live {
			w := float64(g.bootCount[b])
			ma[k] = g.bootAbs[i*s.b+b].value() / w
			ms[k] = g.bootSum[i*s.b+b].value() / w
		}
		st.MeanAbsLo, st.MeanAbsHi = percentileInterval(ma, st.MeanAbs)
		st.MeanLo, st.MeanHi = percentileInterval(ms, st.Mean)
		gs.Features = append(gs.Features, st)
	}
	return gs
}

// percentileInterval returns the 2.5% and 97.5% quantiles of v (v is
// sorted in place), by linear interpolation between order statistics,
// x_(⌊h⌋) + (h − ⌊h⌋)(x_(⌊h⌋+1) − x_(⌊h⌋)) with h = (m − 1)p (Hyndman &
// Fan 1996, "Sample quantiles in statistical packages", definition 7).
// With no replicates both ends are the point estimate.
func percentileInterval(v []float64, point float64) (lo, hi float64) {
	if len(v) == 0 {
		return point, point
	}
	sort.Float64s(v)
	q := func(p float64) float64 {
		h := float64(len(v)-1) * p
		j := int(math.Floor(h))
		if j >= len(v)-1 {
			return v[len(v)-1]
		}
		return v[j] + (h-float64(j))*(v[j+1]-v[j])
	}
	a := (1 - SummaryConfidence) / 2
	return q(a), q(1 - a)
}

// expansion is an exact sum held as non-overlapping float64 partials in
// increasing order of magnitude (Shewchuk 1997).
type expansion []float64

// add adds x exactly (Shewchuk's grow-expansion with two-sum, Knuth 1969,
// TAOCP vol. 2 §4.2.2, from memory: hi = x + y, lo = y − (hi − x) for
// |x| ≥ |y|).
func (e *expansion) add(x float64) {
	p := *e
	i := 0
	for _, y := range p {
		if math.Abs(x) < math.Abs(y) {
			x, y = y, x
		}
		hi := x + y
		lo := y - (hi - x)
		if lo != 0 {
			p[i] = lo
			i++
		}
		x = hi
	}
	p = p[:i]
	if x != 0 {
		p = append(p, x)
	}
	*e = p
}

// addProduct adds w·a exactly: the rounded product and its residual
// fma(w, a, −fl(w·a)), which is exact (Ogita, Rump & Oishi 2005, TwoProduct;
// from memory).
func (e *expansion) addProduct(w, a float64) {
	hi := w * a
	e.add(hi)
	if lo := math.FMA(w, a, -hi); lo != 0 {
		e.add(lo)
	}
}

func (e *expansion) addAll(o expansion) {
	for _, x := range o {
		e.add(x)
	}
}

// value is the exact sum rounded to the nearest float64, ties to even: the
// partials are added from the largest down until the running sum becomes
// inexact, and a remainder of exactly half a unit in the last place is
// resolved by the sign of the next partial (the final step of Python's
// math.fsum, from memory; the tests check it against math/big).
func (e expansion) value() float64 {
	n := len(e)
	if n == 0 {
		return 0
	}
	n--
	hi, lo := e[n], 0.0
	for n > 0 {
		x := hi
		n--
		y := e[n]
		hi = x + y
		lo = y - (hi - x)
		if lo != 0 {
			break
		}
	}
	if n > 0 && ((lo < 0 && e[n-1] < 0) || (lo > 0 && e[n-1] > 0)) {
		y := lo * 2
		x := hi + y
		if x-hi == y {
			hi = x
		}
	}
	return hi
}

// canonical returns the exact sum as a canonical list: c_1 = the sum
// rounded to nearest, c_{k+1} = the remainder rounded to nearest, until the
// remainder is zero. Equal sums give equal lists, however they were
// accumulated; the empty list is zero.
func (e expansion) canonical() []float64 {
	out := []float64{}
	rest := slices.Clone(e)
	for len(rest) > 0 {
		v := rest.value()
		out = append(out, v)
		rest.add(-v)
	}
	return out
}

func expansionOf(parts []float64) (expansion, error) {
	var e expansion
	for _, p := range parts {
		if math.IsNaN(p) || math.IsInf(p, 0) {
			return nil, fmt.Errorf("sum part %v is not finite", p)
		}
		e.add(p)
	}
	return e, nil
}

// canonicalJSON encodes v as JSON with object keys sorted and numbers as
// written, so equal settings give equal bytes after a JSON round trip.
func canonicalJSON(v map[string]any) ([]byte, error) {
	if v == nil {
		return []byte("{}"), nil
	}
	raw, err := json.Marshal(v)
	if err != nil {
		return nil, err
	}
	return canonicalRaw(raw)
}

func canonicalRaw(raw []byte) ([]byte, error) {
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.UseNumber()
	var x any
	if err := dec.Decode(&x); err != nil {
		return nil, err
	}
	if _, ok := x.(map[string]any); !ok && x != nil {
		return nil, fmt.Errorf("settings must be a JSON object, got %s", raw)
	}
	if x == nil {
		return []byte("{}"), nil
	}
	return json.Marshal(x) // maps marshal with sorted keys; json.Number as written
}

// summaryJSON is the JSON document of a Summary.
type summaryJSON struct {
	summaryHead
	Overall groupJSON   `json:"overall"`
	Groups  []groupJSON `json:"groups"`
}

// summaryHead is what a summary's document says before its sums: the
// options and the ledger (the JSON document's first keys, and the binary
// form's header).
type summaryHead struct {
	Format      string          `json:"format"`
	Version     int             `json:"version"`
	Model       string          `json:"model_sha256"`
	Method      Method          `json:"method"`
	Settings    json.RawMessage `json:"settings"`
	Features    []string        `json:"features"`
	GroupBy     string          `json:"group_by"`
	Bootstrap   int             `json:"bootstrap"`
	Seed        uint64          `json:"seed"`
	Confidence  float64         `json:"confidence"`
	Rows        int64           `json:"rows"`
	SkippedRows int             `json:"skipped_rows"`
	Incomplete  int64           `json:"incomplete_rows"`
	Skipped     []SkippedRow    `json:"skipped"`
	Keys        [][2]uint64     `json:"keys"`
}

// head returns the summary's head.
func (s *Summary) head() summaryHead {
	h := summaryHead{
		Format: SummaryFormat, Version: SummaryVersion,
		Model: s.opt.Model, Method: s.opt.Method, Settings: s.settings,
		Features: s.opt.Features, GroupBy: s.opt.GroupBy,
		Bootstrap: s.b, Seed: s.opt.Seed, Confidence: SummaryConfidence,
		Rows: s.all.rows, SkippedRows: s.nskip, Incomplete: s.incomplete, Skipped: s.skipped,
		Keys: s.keysJSON(),
	}
	if h.Skipped == nil {
		h.Skipped = []SkippedRow{}
	}
	return h
}

// groupJSON is one group: derived statistics, then the exact state.
type groupJSON struct {
	GroupStats
	State groupState `json:"state"`
}

// groupState holds the exact sums as canonical lists (see
// expansion.canonical): per feature, and per feature and replicate.
type groupState struct {
	SumAbs    [][]float64   `json:"sum_abs"`
	Sum       [][]float64   `json:"sum"`
	SumSq     [][]float64   `json:"sum_squares"`
	BootCount []int64       `json:"bootstrap_weights"`
	BootAbs   [][][]float64 `json:"bootstrap_sum_abs"`
	BootSum   [][][]float64 `json:"bootstrap_sum"`
}

// MarshalJSON encodes the summary as a stable, documented JSON object
// (snake_case keys; keys are only ever added):
//
//	format, version     "apportion-summary", 1
//	model_sha256, method, settings, features, group_by, bootstrap, seed
//	                    the SummaryOptions; merging compares them
//	confidence          0.95, the level of the intervals
//	rows, skipped_rows  rows summed and rows skipped
//	incomplete_rows     rows summed whose completeness check failed
//	skipped             [{key, group, error}], by key, at most 1000
//	keys                [[lo, hi), ...] the row keys in the summary
//	overall, groups[]   {name, rows, replicates, features: [FeatureStats],
//	                     state: the exact sums}
//
// The state lists each exact sum as a canonical list of float64 values
// whose exact sum it is (c_1 the sum rounded to nearest, c_2 the rounded
// remainder, ...; [] for zero): sum_abs, sum, sum_squares per feature,
// bootstrap_weights (Σ w per replicate), bootstrap_sum_abs and
// bootstrap_sum per feature and replicate. Equal summaries encode to equal
// bytes.
func (s *Summary) MarshalJSON() ([]byte, error) {
	doc := summaryJSON{summaryHead: s.head(), Overall: s.groupJSON("", s.all), Groups: []groupJSON{}}
	for _, name := range s.groupNames() {
		doc.Groups = append(doc.Groups, s.groupJSON(name, s.groups[name]))
	}
	return json.Marshal(doc)
}

func (s *Summary) groupJSON(name string, g *accum) groupJSON {
	st := groupState{
		SumAbs: canonicalAll(g.sumAbs), Sum: canonicalAll(g.sum), SumSq: canonicalAll(g.sumSq),
		BootCount: g.bootCount,
		BootAbs:   make([][][]float64, s.nf), BootSum: make([][][]float64, s.nf),
	}
	for i := 0; i < s.nf; i++ {
		st.BootAbs[i] = canonicalAll(g.bootAbs[i*s.b : (i+1)*s.b])
		st.BootSum[i] = canonicalAll(g.bootSum[i*s.b : (i+1)*s.b])
	}
	return groupJSON{GroupStats: s.stats(name, g), State: st}
}

func canonicalAll(es []expansion) [][]float64 {
	out := make([][]float64, len(es))
	for i, e := range es {
		out[i] = e.canonical()
	}
	return out
}

// UnmarshalJSON decodes a document written by MarshalJSON, checking it
// whole: the statistics are recomputed from the state, not read. Errors
// wrap ErrInput.
func (s *Summary) UnmarshalJSON(raw []byte) error {
	var doc summaryJSON
	if err := json.Unmarshal(raw, &doc); err != nil {
		return fmt.Errorf("%w: summary JSON: %v", ErrInput, err)
	}
	if doc.Format != SummaryFormat || doc.Version != SummaryVersion {
		return fmt.Errorf("%w: summary JSON: expected format %q version %d, got format %q version %d", ErrInput, SummaryFormat, SummaryVersion, doc.Format, doc.Version)
	}
	var settings map[string]any
	if len(doc.Settings) > 0 && string(doc.Settings) != "null" {
		dec := json.NewDecoder(bytes.NewReader(doc.Settings))
		dec.UseNumber()
		if err := dec.Decode(&settings); err != nil {
			return fmt.Errorf("%w: summary JSON: settings: %v", ErrInput, err)
		}
	}
	if doc.Bootstrap <= 0 {
		return fmt.Errorf("%w: summary JSON: bootstrap %d, want ≥ 1", ErrInput, doc.Bootstrap)
	}
	// The sums the document lists bound what decoding it may allocate.
	if err := doc.Overall.State.check(len(doc.Features), doc.Bootstrap, "overall"); err != nil {
		return err
	}
	n, err := NewSummary(SummaryOptions{
		Features: doc.Features, Model: doc.Model, Method: doc.Method, Settings: settings,
		GroupBy: doc.GroupBy, Bootstrap: doc.Bootstrap, Seed: doc.Seed,
	})
	if err != nil {
		return fmt.Errorf("%w: summary JSON: %v", ErrInput, err)
	}
	if n.all, err = n.readGroup(doc.Overall, "overall"); err != nil {
		return err
	}
	if err := n.checkGroups(len(doc.Groups)); err != nil {
		return fmt.Errorf("%w: summary JSON: %w", ErrInput, err)
	}
	var total int64
	for _, gj := range doc.Groups {
		if gj.Name == "" || n.groups[gj.Name] != nil {
			return fmt.Errorf("%w: summary JSON: group name %q is empty or repeated", ErrInput, gj.Name)
		}
		g, err := n.readGroup(gj, fmt.Sprintf("group %q", gj.Name))
		if err != nil {
			return err
		}
		total += g.rows
		n.groups[gj.Name] = g
	}
	if doc.Rows != n.all.rows || total > n.all.rows || doc.SkippedRows < len(doc.Skipped) || doc.SkippedRows < 0 {
		return fmt.Errorf("%w: summary JSON: inconsistent counts: rows %d, overall rows %d, rows in groups %d, skipped %d with %d listed", ErrInput, doc.Rows, n.all.rows, total, doc.SkippedRows, len(doc.Skipped))
	}
	if n.rowLedger, err = readLedger(doc.Keys, doc.Skipped, doc.SkippedRows, n.all.rows, doc.Incomplete); err != nil {
		return err
	}
	*s = *n
	return nil
}

// DecodeSummary reads one summary JSON document (see MarshalJSON) from r.
// Every error, a syntax error included, wraps ErrInput.
func DecodeSummary(r io.Reader) (*Summary, error) {
	raw, err := io.ReadAll(r)
	if err != nil {
		return nil, fmt.Errorf("%w: reading summary: %v", ErrInput, err)
	}
	if !json.Valid(raw) {
		var x any
		err := json.Unmarshal(raw, &x)
		return nil, fmt.Errorf("%w: not a summary document: %v", ErrInput, err)
	}
	s := new(Summary)
	if err := s.UnmarshalJSON(raw); err != nil {
		return nil, err
	}
	return s, nil
}

// check reports a state that does not hold the sums of nf features and b
// replicates, before any of them is allocated.
func (st *groupState) check(nf, b int, what string) error {
	bad := func(format string, a ...any) error {
		return fmt.Errorf("%w: summary JSON: %s: %s", ErrInput, what, fmt.Sprintf(format, a...))
	}
	if len(st.SumAbs) != nf || len(st.Sum) != nf || len(st.SumSq) != nf || len(st.BootAbs) != nf || len(st.BootSum) != nf {
		return bad("state: expected sums for %d features", nf)
	}
	if len(st.BootCount) != b {
		return bad("state: expected %d bootstrap weights, got %d", b, len(st.BootCount))
	}
	for i := range nf {
		if len(st.BootAbs[i]) != b || len(st.BootSum[i]) != b {
			return bad("state: expected %d bootstrap sums for feature %d", b, i)
		}
	}
	return nil
}

func (s *Summary) readGroup(gj groupJSON, what string) (*accum, error) {
	st := gj.State
	bad := func(format string, a ...any) error {
		return fmt.Errorf("%w: summary JSON: %s: %s", ErrInput, what, fmt.Sprintf(format, a...))
	}
	if gj.Rows < 0 {
		return nil, bad("rows %d", gj.Rows)
	}
	if err := st.check(s.nf, s.b, what); err != nil {
		return nil, err
	}
	g := s.newAccum()
	g.rows = int64(gj.Rows)
	for b, c := range st.BootCount {
		if c < 0 {
			return nil, bad("state: bootstrap weight %d is %d", b, c)
		}
		g.bootCount[b] = c
	}
	var err error
	read := func(dst []expansion, src [][]float64, name string) error {
		if len(src) != len(dst) {
			return bad("state: %s: expected %d sums, got %d", name, len(dst), len(src))
		}
		for i, parts := range src {
			if dst[i], err = expansionOf(parts); err != nil {
				return bad("state: %s %d: %v", name, i, err)
			}
		}
		return nil
	}
	if err := read(g.sumAbs, st.SumAbs, "sum_abs"); err != nil {
		return nil, err
	}
	if err := read(g.sum, st.Sum, "sum"); err != nil {
		return nil, err
	}
	if err := read(g.sumSq, st.SumSq, "sum_squares"); err != nil {
		return nil, err
	}
	for i := 0; i < s.nf; i++ {
		if err := read(g.bootAbs[i*s.b:(i+1)*s.b], st.BootAbs[i], "bootstrap_sum_abs"); err != nil {
			return nil, err
		}
		if err := read(g.bootSum[i*s.b:(i+1)*s.b], st.BootSum[i], "bootstrap_sum"); err != nil {
			return nil, err
		}
	}
	return g, nil
}
