package render

import (
	"encoding/csv"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"unicode/utf8"

	"github.com/apportion/apportion/gradattr"
)

// ManyGroups is the number of groups above which SummaryWarnings asks
// whether the grouping column is a feature: a column with more distinct
// values than that seldom names subgroups.
const ManyGroups = 50

// SummaryWarnings are what a summary's numbers do not say by themselves:
// that it has more than ManyGroups groups.
func SummaryWarnings(s *gradattr.Summary) []string {
	if n := len(s.Groups()); n > ManyGroups {
		return []string{fmt.Sprintf("grouping by %s makes %d groups, more than %d: is %s a feature or an identifier rather than a subgroup? Each group's intervals come from few rows", s.Options().GroupBy, n, ManyGroups, s.Options().GroupBy)}
	}
	return nil
}

// SummaryTable prints the overall statistics and then each group's,
// features ranked by mean |attribution|, with a bar of mean |a| on one
// scale for every group.
func SummaryTable(w io.Writer, s *gradattr.Summary, modelName string) {
	o := s.Options()
	fmt.Fprintf(w, "model %s  method %s\n", summaryModel(o.Model, modelName), o.Method)
	fmt.Fprintf(w, "%d rows summarised%s, %d skipped; 95%% intervals from %d Poisson bootstrap replicates (seed %d)\n",
		s.Rows(), incompleteNote(s.IncompleteRows()), s.SkippedRows(), o.Bootstrap, o.Seed)
	scale := 0.0
	for _, g := range append([]gradattr.GroupStats{s.Overall()}, s.Groups()...) {
		for _, f := range g.Features {
			scale = math.Max(scale, f.MeanAbs)
		}
	}
	writeGroupStats(w, "all rows", s.Overall(), scale)
	for _, g := range s.Groups() {
		writeGroupStats(w, o.GroupBy+" = "+g.Name, g, scale)
	}
	if s.Rows() > 0 {
		fmt.Fprintf(w, "\n(a full bar is a mean |a| of %s, the largest of any group)\n", Number(scale))
	}
}

// summaryModel names a summarised model by its name, when known, and the
// start of its SHA-256.
func summaryModel(sha256, name string) string {
	model := "sha256 " + sha256
	if len(sha256) > 12 {
		model = "sha256 " + sha256[:12] + "…"
	}
	if name != "" {
		model = name + " (" + model + ")"
	}
	return model
}

func writeGroupStats(w io.Writer, title string, g gradattr.GroupStats, scale float64) {
	fmt.Fprintf(w, "\n%s (%d rows)\n", title, g.Rows)
	if g.Rows == 0 {
		return
	}
	ranked := g.Ranked()
	hidden := 0
	if len(ranked) > MaxFeatures {
		hidden = len(ranked) - MaxFeatures
		ranked = ranked[:MaxFeatures]
	}
	defer func() {
		if hidden > 0 {
			fmt.Fprintf(w, "  (%d features with smaller mean |a| not shown; -format json or csv lists all)\n", hidden)
		}
	}()
	num := func(v float64) string { return strconv.FormatFloat(v, 'g', 4, 64) }
	signed := func(v float64) string {
		if v >= 0 {
			return "+" + num(v)
		}
		return num(v)
	}
	// Columns: feature, mean |a|, lo, hi, mean a, lo, hi.
	cells := [][7]string{}
	for _, f := range ranked {
		cells = append(cells, [7]string{f.Feature, num(f.MeanAbs), num(f.MeanAbsLo), num(f.MeanAbsHi),
			signed(f.Mean), signed(f.MeanLo), signed(f.MeanHi)})
	}
	var width [7]int
	for _, r := range append(cells, [7]string{"feature", "mean |a|", "", "", "mean a"}) {
		for k, cell := range r {
			width[k] = max(width[k], utf8.RuneCountInString(cell))
		}
	}
	pad := func(s string, n int) string { return strings.Repeat(" ", max(0, n-utf8.RuneCountInString(s))) }
	interval := func(lo, hi string, wl, wh int) string { return "[" + pad(lo, wl) + lo + ", " + pad(hi, wh) + hi + "]" }
	iw1 := width[2] + width[3] + 4
	iw2 := width[5] + width[6] + 4
	fmt.Fprintf(w, "  %s%s  %s%s  %s%s  %s%s  %s\n", "feature", pad("feature", width[0]),
		pad("mean |a|", width[1]), "mean |a|", "95% interval", pad("95% interval", iw1),
		pad("mean a", width[4]), "mean a", "95% interval")
	for n, r := range cells {
		// The right half of explain's signed bar: mean |a| ≥ 0.
		_, right, _ := strings.Cut(bar(ranked[n].MeanAbs, scale), "│")
		line := fmt.Sprintf("  %s%s  %s%s  %s%s  %s%s  %s%s  %s", r[0], pad(r[0], width[0]),
			pad(r[1], width[1]), r[1], interval(r[2], r[3], width[2], width[3]), pad("", max(0, 12-iw1)),
			pad(r[4], width[4]), r[4], interval(r[5], r[6], width[5], width[6]), pad("", max(0, 12-iw2)),
			strings.TrimRight(right, " "))
		fmt.Fprintln(w, strings.TrimRight(line, " "))
	}
}

// SummaryCSV writes one record per group and feature, ranked within
// each group; the first group is all rows (scope "all").
func SummaryCSV(w io.Writer, s *gradattr.Summary) error {
	cw := csv.NewWriter(w)
	if err := cw.Write([]string{"scope", "group", "rows", "rank", "feature", "mean_abs", "mean_abs_lo", "mean_abs_hi", "mean", "mean_lo", "mean_hi", "sd"}); err != nil {
		return err
	}
	g := func(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }
	emit := func(scope string, gs gradattr.GroupStats) error {
		for rank, f := range gs.Ranked() {
			rec := []string{scope, gs.Name, strconv.Itoa(gs.Rows), strconv.Itoa(rank + 1), f.Feature,
				g(f.MeanAbs), g(f.MeanAbsLo), g(f.MeanAbsHi), g(f.Mean), g(f.MeanLo), g(f.MeanHi), g(f.SD)}
			if err := cw.Write(rec); err != nil {
				return err
			}
		}
		return nil
	}
	if err := emit("all", s.Overall()); err != nil {
		return err
	}
	for _, gs := range s.Groups() {
		if err := emit(s.Options().GroupBy, gs); err != nil {
			return err
		}
	}
	cw.Flush()
	return cw.Error()
}

// incompleteNote says how many rows summed failed their completeness
// check: "" for none.
func incompleteNote(n int) string {
	if n == 0 {
		return ""
	}
	return fmt.Sprintf(" (%d failed their completeness check)", n)
}
