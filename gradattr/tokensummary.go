package gradattr

import (
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"slices"
	"sort"

	"gonum.org/v1/gonum/stat/distuv"
)

// Token summary document identification, in the "format" and "version"
// keys.
const (
	TokenSummaryFormat  = "apportion-token-summary"
	TokenSummaryVersion = 1
)

// MaxSummaryTokens bounds the distinct token strings one group of a
// TokenSummary may keep.
const MaxSummaryTokens = 1 << 20

// TokenSummaryOptions describes what a TokenSummary summarises. Two token
// summaries merge only when their options are equal (Settings compared as
// JSON values).
type TokenSummaryOptions struct {
	// Model identifies the model, e.g. the hex SHA-256 of its file.
	Model string
	// Method is the attribution method.
	Method Method
	// Settings are the method settings the attributions were computed
	// with; they must marshal to a JSON object (or be nil).
	Settings map[string]any
	// GroupBy names what the subgroup keys are; "" when rows are not
	// grouped.
	GroupBy string
	// Padding is the token string that fills a text to the model's length
	// ("" when the model names none). Its occurrences are summed like any
	// other token's; the name is kept so that readers can tell it apart.
	Padding string
}

// TokenSummary aggregates per-token attributions of many rows (texts) by
// token string: for every token string seen, over all rows and per
// subgroup, the number of occurrences n and the exact sums Σa, Σ|a| and
// Σa² (= Σ|a|²) over its occurrences. From them
//
//	mean = Σa / n      mean_abs = Σ|a| / n
//	sd   = √((Σa² − n·mean²) / (n − 1))      sd_abs likewise with mean_abs
//
// and the 95% intervals are Student t intervals on the occurrences,
// mean ± t_{0.975, n−1} · sd / √n (Student 1908), the same for mean_abs;
// none for n = 1. The occurrences of a token within one text are treated
// as independent, common practice for such tables; the interval is
// narrower than it should be when a token repeats within texts.
//
// Sums are kept exactly, as in Summary, so a merged token summary equals,
// bit for bit, the token summary of all its rows in one, in any order and
// any split. Each row key may enter a summary once (added or skipped). A
// TokenSummary is not safe for concurrent use.
type TokenSummary struct {
	opt      TokenSummaryOptions
	settings []byte
	rowLedger
	all    *tokenAccum
	groups map[string]*tokenAccum
}

type tokenAccum struct {
	rows   int64
	tokens map[string]*tokenSums
}

type tokenSums struct {
	n                int64
	sum, sumAbs, sq2 expansion
}

// NewTokenSummary returns an empty token summary. Errors wrap ErrOptions.
func NewTokenSummary(opt TokenSummaryOptions) (*TokenSummary, error) {
	settings, err := canonicalJSON(opt.Settings)
	if err != nil {
		return nil, fmt.Errorf("%w: summary settings: %v", ErrOptions, err)
	}
	return &TokenSummary{opt: opt, settings: settings, all: newTokenAccum(), groups: map[string]*tokenAccum{}}, nil
}

func newTokenAccum() *tokenAccum { return &tokenAccum{tokens: map[string]*tokenSums{}} }

// Options returns the summary's options.
func (s *TokenSummary) Options() TokenSummaryOptions { return s.opt }

// Add sums the per-token attributions attr of the row with the given key,
// whose tokens are tokens (one string per position), into the whole and
// into subgroup group ("" for none). Unequal lengths, a NaN, an infinity
// or a value beyond MaxSummaryValue, or a key already in the summary, are
// refused with an error wrapping ErrInput and change nothing.
func (s *TokenSummary) Add(key uint64, group string, tokens []string, attr []float64) error {
	if len(tokens) != len(attr) {
		return fmt.Errorf("%w: row %d has %d tokens and %d attributions, want one per token", ErrInput, key, len(tokens), len(attr))
	}
	for i, a := range attr {
		if math.IsNaN(a) || math.Abs(a) > MaxSummaryValue {
			return fmt.Errorf("%w: row %d, token %d (%s): attribution %v, want a finite number of magnitude ≤ %g", ErrInput, key, i, tokens[i], a, MaxSummaryValue)
		}
	}
	g := s.groups[group]
	if group != "" && g == nil && len(s.groups) >= MaxSummaryGroups {
		return fmt.Errorf("%w: row %d: group %q: more than the %d groups a summary may keep", ErrInput, key, group, MaxSummaryGroups)
	}
	for _, acc := range []*tokenAccum{s.all, g} {
		if acc != nil && len(acc.tokens)+len(tokens) > MaxSummaryTokens {
			if err := acc.room(tokens); err != nil {
				return fmt.Errorf("%w: row %d: %w", ErrInput, key, err)
			}
		}
	}
	if !s.takeKey(key) {
		return fmt.Errorf("%w: row key %d is already in the summary", ErrInput, key)
	}
	if group != "" && g == nil {
		g = newTokenAccum()
		s.groups[group] = g
	}
	s.all.add(tokens, attr)
	if g != nil {
		g.add(tokens, attr)
	}
	return nil
}

// room reports whether the tokens' new strings fit under MaxSummaryTokens.
func (g *tokenAccum) room(tokens []string) error {
	n := len(g.tokens)
	seen := map[string]bool{}
	for _, t := range tokens {
		if g.tokens[t] == nil && !seen[t] {
			seen[t] = true
			n++
		}
	}
	if n > MaxSummaryTokens {
		return fmt.Errorf("%d distinct tokens, more than the %d a summary may keep", n, MaxSummaryTokens)
	}
	return nil
}

func (g *tokenAccum) add(tokens []string, attr []float64) {
	g.rows++
	for i, t := range tokens {
		ts := g.tokens[t]
		if ts == nil {
			ts = &tokenSums{}
			g.tokens[t] = ts
		}
		a := attr[i]
		ts.n++
		ts.sum.add(a)
		ts.sumAbs.add(math.Abs(a))
		ts.sq2.addProduct(a, a)
	}
}

func (g *tokenAccum) merge(o *tokenAccum) {
	g.rows += o.rows
	for t, os := range o.tokens {
		ts := g.tokens[t]
		if ts == nil {
			ts = &tokenSums{}
			g.tokens[t] = ts
		}
		ts.n += os.n
		ts.sum.addAll(os.sum)
		ts.sumAbs.addAll(os.sumAbs)
		ts.sq2.addAll(os.sq2)
	}
}

// Skip records that the row with the given key failed with reason. It is
// counted (and its message kept, up to MaxSkippedKept) but not summed.
func (s *TokenSummary) Skip(key uint64, group string, reason error) error {
	return s.skip(key, group, reason)
}

// Merge adds o into s, so that s summarises the rows of both. It refuses,
// with an error wrapping ErrMismatch and ErrInput and leaving s unchanged,
// summaries whose options differ or whose row keys overlap.
func (s *TokenSummary) Merge(o *TokenSummary) error {
	mismatch := func(what string, a, b any) error {
		return &MismatchError{What: what, A: fmt.Sprint(a), B: fmt.Sprint(b)}
	}
	switch {
	case o == nil:
		return mismatch("summary", "a summary", "none")
	case s.opt.Model != o.opt.Model:
		return mismatch("model", short(s.opt.Model), short(o.opt.Model))
	case s.opt.Method != o.opt.Method:
		return mismatch("method", s.opt.Method, o.opt.Method)
	case !bytes.Equal(s.settings, o.settings):
		return mismatch("settings", string(s.settings), string(o.settings))
	case s.opt.GroupBy != o.opt.GroupBy:
		return mismatch("grouped by", fmt.Sprintf("%q", s.opt.GroupBy), fmt.Sprintf("%q", o.opt.GroupBy))
	case s.opt.Padding != o.opt.Padding:
		return mismatch("padding token", fmt.Sprintf("%q", s.opt.Padding), fmt.Sprintf("%q", o.opt.Padding))
	}
	groups := len(s.groups)
	for name := range o.groups {
		if s.groups[name] == nil {
			groups++
		}
	}
	if groups > MaxSummaryGroups {
		return fmt.Errorf("%w: merged summary: %d groups, more than the %d a summary may keep", ErrInput, groups, MaxSummaryGroups)
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
			mine = newTokenAccum()
			s.groups[name] = mine
		}
		mine.merge(g)
	}
	return nil
}

// Rows returns the number of rows summed (skipped rows excluded).
func (s *TokenSummary) Rows() int { return int(s.all.rows) }

// SkippedRows returns the number of skipped rows.
func (s *TokenSummary) SkippedRows() int { return s.nskip }

// IncompleteRows returns the number of rows summed whose completeness
// check failed (see AddIncomplete).
func (s *TokenSummary) IncompleteRows() int { return int(s.incomplete) }

// AddIncomplete is Add for a row whose completeness check was judged and
// failed: summed like any other row, and counted in IncompleteRows.
func (s *TokenSummary) AddIncomplete(key uint64, group string, tokens []string, attr []float64) error {
	if err := s.Add(key, group, tokens, attr); err != nil {
		return err
	}
	s.incomplete++
	return nil
}

// Skipped returns the skipped rows kept, in key order.
func (s *TokenSummary) Skipped() []SkippedRow { return slices.Clone(s.skipped) }

// TokenStats are the statistics of one token string's attributions over
// its Count occurrences in one group (see TokenSummary). The interval
// bounds are nil when Count is 1.
type TokenStats struct {
	Token     string   `json:"token"`
	Count     int64    `json:"count"`
	MeanAbs   float64  `json:"mean_abs"`
	MeanAbsLo *float64 `json:"mean_abs_lo"`
	MeanAbsHi *float64 `json:"mean_abs_hi"`
	Mean      float64  `json:"mean"`
	MeanLo    *float64 `json:"mean_lo"`
	MeanHi    *float64 `json:"mean_hi"`
	SD        float64  `json:"sd"`
}

// TokenGroupStats are the statistics of one group of rows.
type TokenGroupStats struct {
	// Name is the group's key, "" for all rows.
	Name string `json:"name"`
	// Rows is the number of rows summed in the group.
	Rows int64 `json:"rows"`
	// Tokens holds one entry per token string seen, in string order.
	Tokens []TokenStats `json:"tokens"`
}

// Ranked returns the tokens by decreasing mean |attribution| (ties by
// string).
func (g TokenGroupStats) Ranked() []TokenStats {
	out := slices.Clone(g.Tokens)
	sort.SliceStable(out, func(i, j int) bool { return out[i].MeanAbs > out[j].MeanAbs })
	return out
}

// Overall returns the statistics over all rows.
func (s *TokenSummary) Overall() TokenGroupStats { return s.all.stats("") }

// Groups returns the statistics of each subgroup, by name.
func (s *TokenSummary) Groups() []TokenGroupStats {
	var out []TokenGroupStats
	for _, name := range sortedKeys(s.groups) {
		out = append(out, s.groups[name].stats(name))
	}
	return out
}

func sortedKeys[V any](m map[string]V) []string {
	out := make([]string, 0, len(m))
	for k := range m {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}

func (g *tokenAccum) stats(name string) TokenGroupStats {
	out := TokenGroupStats{Name: name, Rows: g.rows, Tokens: []TokenStats{}}
	for _, t := range sortedKeys(g.tokens) {
		out.Tokens = append(out.Tokens, g.tokens[t].stats(t))
	}
	return out
}

func (ts *tokenSums) stats(token string) TokenStats {
	n := float64(ts.n)
	st := TokenStats{Token: token, Count: ts.n, Mean: ts.sum.value() / n, MeanAbs: ts.sumAbs.value() / n}
	if ts.n < 2 {
		return st
	}
	sq := ts.sq2.value()
	sd := func(mean float64) float64 { return math.Sqrt(math.Max(0, (sq-n*mean*mean)/(n-1))) }
	st.SD = sd(st.Mean)
	st.MeanLo, st.MeanHi = StudentInterval(st.Mean, st.SD, ts.n)
	st.MeanAbsLo, st.MeanAbsHi = StudentInterval(st.MeanAbs, sd(st.MeanAbs), ts.n)
	return st
}

// StudentInterval returns the SummaryConfidence interval of a mean of n
// independent observations with sample standard deviation sd:
// mean ± t_{q, n−1} · sd / √n with q = (1 + SummaryConfidence) / 2
// (Student 1908); nil bounds when n < 2.
func StudentInterval(mean, sd float64, n int64) (lo, hi *float64) {
	if n < 2 {
		return nil, nil
	}
	t := distuv.StudentsT{Mu: 0, Sigma: 1, Nu: float64(n - 1)}.Quantile((1 + SummaryConfidence) / 2)
	h := t * sd / math.Sqrt(float64(n))
	l, u := mean-h, mean+h
	return &l, &u
}

// tokenSummaryJSON is the JSON document of a TokenSummary.
type tokenSummaryJSON struct {
	Format      string           `json:"format"`
	Version     int              `json:"version"`
	Model       string           `json:"model_sha256"`
	Method      Method           `json:"method"`
	Settings    json.RawMessage  `json:"settings"`
	GroupBy     string           `json:"group_by"`
	Padding     string           `json:"padding_token"`
	Confidence  float64          `json:"confidence"`
	Rows        int64            `json:"rows"`
	SkippedRows int              `json:"skipped_rows"`
	Incomplete  int64            `json:"incomplete_rows"`
	Skipped     []SkippedRow     `json:"skipped"`
	Keys        [][2]uint64      `json:"keys"`
	Overall     tokenGroupJSON   `json:"overall"`
	Groups      []tokenGroupJSON `json:"groups"`
}

type tokenGroupJSON struct {
	TokenGroupStats
	State []tokenStateJSON `json:"state"`
}

// tokenStateJSON holds one token's exact sums as canonical lists (see
// expansion.canonical).
type tokenStateJSON struct {
	Token  string    `json:"token"`
	Count  int64     `json:"count"`
	Sum    []float64 `json:"sum"`
	SumAbs []float64 `json:"sum_abs"`
	SumSq  []float64 `json:"sum_squares"`
}

// MarshalJSON encodes the token summary as a stable, documented JSON
// object (snake_case keys; keys are only ever added):
//
//	format, version     "apportion-token-summary", 1
//	model_sha256, method, settings, group_by, padding_token
//	                    the TokenSummaryOptions; merging compares them
//	confidence          0.95, the level of the Student t intervals
//	rows, skipped_rows  rows summed and rows skipped
//	incomplete_rows     rows summed whose completeness check failed
//	skipped             [{key, group, error}], by key, at most 1000
//	keys                [[lo, hi), ...] the row keys in the summary
//	overall, groups[]   {name, rows, tokens: [TokenStats], state}
//
// state lists, per token string in string order, count and the exact sums
// sum (Σa), sum_abs (Σ|a|) and sum_squares (Σa², which is also Σ|a|²),
// each as a canonical list of float64 values whose exact sum it is.
// Equal summaries encode to equal bytes.
func (s *TokenSummary) MarshalJSON() ([]byte, error) {
	doc := tokenSummaryJSON{
		Format: TokenSummaryFormat, Version: TokenSummaryVersion,
		Model: s.opt.Model, Method: s.opt.Method, Settings: s.settings,
		GroupBy: s.opt.GroupBy, Padding: s.opt.Padding, Confidence: SummaryConfidence,
		Rows: s.all.rows, SkippedRows: s.nskip, Incomplete: s.incomplete, Skipped: s.skipped,
		Keys:    s.keysJSON(),
		Overall: s.all.json(""), Groups: []tokenGroupJSON{},
	}
	if doc.Skipped == nil {
		doc.Skipped = []SkippedRow{}
	}
	for _, name := range sortedKeys(s.groups) {
		doc.Groups = append(doc.Groups, s.groups[name].json(name))
	}
	return json.Marshal(doc)
}

func (g *tokenAccum) json(name string) tokenGroupJSON {
	out := tokenGroupJSON{TokenGroupStats: g.stats(name), State: []tokenStateJSON{}}
	for _, t := range sortedKeys(g.tokens) {
		ts := g.tokens[t]
		out.State = append(out.State, tokenStateJSON{Token: t, Count: ts.n,
			Sum: ts.sum.canonical(), SumAbs: ts.sumAbs.canonical(), SumSq: ts.sq2.canonical()})
	}
	return out
}

// UnmarshalJSON decodes a document written by MarshalJSON; the statistics
// are recomputed from the state, not read. Errors wrap ErrInput.
func (s *TokenSummary) UnmarshalJSON(raw []byte) error {
	var head struct {
		Format  string `json:"format"`
		Version int    `json:"version"`
	}
	if err := json.Unmarshal(raw, &head); err != nil {
		return fmt.Errorf("%w: token summary JSON: %v", ErrInput, err)
	}
	if head.Format != TokenSummaryFormat || head.Version != TokenSummaryVersion {
		return fmt.Errorf("%w: token summary JSON: expected format %q version %d, got format %q version %d", ErrInput, TokenSummaryFormat, TokenSummaryVersion, head.Format, head.Version)
	}
	var doc tokenSummaryJSON
	if err := json.Unmarshal(raw, &doc); err != nil {
		return fmt.Errorf("%w: token summary JSON: %v", ErrInput, err)
	}
	if doc.Format != TokenSummaryFormat || doc.Version != TokenSummaryVersion {
		return fmt.Errorf("%w: token summary JSON: expected format %q version %d, got format %q version %d", ErrInput, TokenSummaryFormat, TokenSummaryVersion, doc.Format, doc.Version)
	}
	var settings map[string]any
	if len(doc.Settings) > 0 && string(doc.Settings) != "null" {
		dec := json.NewDecoder(bytes.NewReader(doc.Settings))
		dec.UseNumber()
		if err := dec.Decode(&settings); err != nil {
			return fmt.Errorf("%w: token summary JSON: settings: %v", ErrInput, err)
		}
	}
	n, err := NewTokenSummary(TokenSummaryOptions{Model: doc.Model, Method: doc.Method, Settings: settings, GroupBy: doc.GroupBy, Padding: doc.Padding})
	if err != nil {
		return fmt.Errorf("%w: token summary JSON: %v", ErrInput, err)
	}
	if n.all, err = readTokenGroup(doc.Overall, "overall"); err != nil {
		return err
	}
	if len(doc.Groups) > MaxSummaryGroups {
		return fmt.Errorf("%w: token summary JSON: %d groups, more than the %d a summary may keep", ErrInput, len(doc.Groups), MaxSummaryGroups)
	}
	var total int64
	for _, gj := range doc.Groups {
		if gj.Name == "" || n.groups[gj.Name] != nil {
			return fmt.Errorf("%w: token summary JSON: group name %q is empty or repeated", ErrInput, gj.Name)
		}
		g, err := readTokenGroup(gj, fmt.Sprintf("group %q", gj.Name))
		if err != nil {
			return err
		}
		n.groups[gj.Name] = g
		total += g.rows
	}
	if len(doc.Groups) > 0 && total != doc.Rows {
		return fmt.Errorf("%w: token summary JSON: the groups hold %d rows, the summary %d", ErrInput, total, doc.Rows)
	}
	if doc.Overall.Rows != doc.Rows || doc.Rows < 0 {
		return fmt.Errorf("%w: token summary JSON: rows %d, overall rows %d, skipped rows %d do not agree", ErrInput, doc.Rows, doc.Overall.Rows, doc.SkippedRows)
	}
	if n.rowLedger, err = readLedger(doc.Keys, doc.Skipped, doc.SkippedRows, doc.Rows, doc.Incomplete); err != nil {
		return err
	}
	*s = *n
	return nil
}

func readTokenGroup(gj tokenGroupJSON, where string) (*tokenAccum, error) {
	if gj.Rows < 0 {
		return nil, fmt.Errorf("%w: token summary JSON: %s: rows %d, want ≥ 0", ErrInput, where, gj.Rows)
	}
	if len(gj.State) > MaxSummaryTokens {
		return nil, fmt.Errorf("%w: token summary JSON: %s: %d tokens, more than the %d a summary may keep", ErrInput, where, len(gj.State), MaxSummaryTokens)
	}
	g := &tokenAccum{rows: gj.Rows, tokens: make(map[string]*tokenSums, len(gj.State))}
	for _, st := range gj.State {
		if st.Count < 1 || g.tokens[st.Token] != nil {
			return nil, fmt.Errorf("%w: token summary JSON: %s: token %q: count %d, or listed twice", ErrInput, where, st.Token, st.Count)
		}
		ts := &tokenSums{n: st.Count}
		var err error
		for _, p := range []struct {
			e    *expansion
			list []float64
			name string
		}{{&ts.sum, st.Sum, "sum"}, {&ts.sumAbs, st.SumAbs, "sum_abs"}, {&ts.sq2, st.SumSq, "sum_squares"}} {
			if *p.e, err = expansionOf(p.list); err != nil {
				return nil, fmt.Errorf("%w: token summary JSON: %s: token %q: %s: %v", ErrInput, where, st.Token, p.name, err)
			}
		}
		g.tokens[st.Token] = ts
	}
	return g, nil
}

// DecodeTokenSummary reads a token summary JSON document (see
// TokenSummary.MarshalJSON). Errors wrap ErrInput.
func DecodeTokenSummary(r io.Reader) (*TokenSummary, error) {
	raw, err := io.ReadAll(r)
	if err != nil {
		return nil, err
	}
	var s TokenSummary
	if err := s.UnmarshalJSON(raw); err != nil {
		return nil, err
	}
	return &s, nil
}

// SummaryDocumentFormat returns the "format" of a summary JSON document:
// SummaryFormat for a summary per feature, TokenSummaryFormat for one per
// token string. Errors wrap ErrInput.
func SummaryDocumentFormat(raw []byte) (string, error) {
	var head struct {
		Format string `json:"format"`
	}
	if err := json.Unmarshal(raw, &head); err != nil {
		return "", fmt.Errorf("%w: summary JSON: %v", ErrInput, err)
	}
	return head.Format, nil
}
