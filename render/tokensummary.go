package render

import (
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"unicode/utf8"

	"github.com/apportion/apportion/gradattr"
)

// MaxTokenRows is the number of tokens TokenSummaryTable shows per group:
// those of largest mean |attribution|.
const MaxTokenRows = 20

// TokenSummaryTable prints a summary per token string: over all rows and
// then per group, the tokens of largest mean |attribution| with their
// number of occurrences, mean |a| and mean a with 95% Student t
// intervals, and a bar of mean |a| on one scale for every group.
func TokenSummaryTable(w io.Writer, s *gradattr.TokenSummary, modelName string) {
	o := s.Options()
	fmt.Fprintf(w, "model %s  method %s, per token string\n", summaryModel(o.Model, modelName), o.Method)
	fmt.Fprintf(w, "%d rows summarised%s, %d skipped; 95%% Student t intervals over each token's occurrences\n", s.Rows(), incompleteNote(s.IncompleteRows()), s.SkippedRows())
	groups := append([]gradattr.TokenGroupStats{s.Overall()}, s.Groups()...)
	scale := 0.0
	for _, g := range groups {
		for _, t := range g.Tokens {
			scale = math.Max(scale, t.MeanAbs)
		}
	}
	for i, g := range groups {
		title := "all rows"
		if i > 0 {
			title = o.GroupBy + " = " + g.Name
		}
		writeTokenStats(w, title, g, scale)
	}
	if s.Rows() > 0 {
		fmt.Fprintf(w, "\n(a full bar is a mean |a| of %s, the largest of any group; – marks no interval, for a token seen once)\n", Number(scale))
	}
	if o.Padding != "" {
		fmt.Fprintf(w, "(%s is the padding token that fills a text to the model's length: it is summed like any other token)\n", o.Padding)
	}
}

func writeTokenStats(w io.Writer, title string, g gradattr.TokenGroupStats, scale float64) {
	fmt.Fprintf(w, "\n%s (%d rows, %d distinct tokens)\n", title, g.Rows, len(g.Tokens))
	if g.Rows == 0 {
		return
	}
	ranked := g.Ranked()
	hidden := max(0, len(ranked)-MaxTokenRows)
	ranked = ranked[:len(ranked)-hidden]
	num := func(v float64) string { return strconv.FormatFloat(v, 'g', 4, 64) }
	signed := func(v float64) string {
		if v >= 0 {
			return "+" + num(v)
		}
		return num(v)
	}
	interval := func(lo, hi *float64, f func(float64) string) string {
		if lo == nil {
			return "–"
		}
		return "[" + f(*lo) + ", " + f(*hi) + "]"
	}
	cells := [][6]string{{"token", "n", "mean |a|", "95% interval", "mean a", "95% interval"}}
	for _, t := range ranked {
		cells = append(cells, [6]string{t.Token, strconv.FormatInt(t.Count, 10), num(t.MeanAbs),
			interval(t.MeanAbsLo, t.MeanAbsHi, num), signed(t.Mean), interval(t.MeanLo, t.MeanHi, signed)})
	}
	var width [6]int
	for _, r := range cells {
		for k, c := range r {
			width[k] = max(width[k], utf8.RuneCountInString(c))
		}
	}
	pad := func(s string, n int) string { return strings.Repeat(" ", max(0, n-utf8.RuneCountInString(s))) }
	for n, r := range cells {
		line := fmt.Sprintf("  %s%s  %s%s  %s%s  %s%s  %s%s  %s%s", r[0], pad(r[0], width[0]),
			pad(r[1], width[1]), r[1], pad(r[2], width[2]), r[2], r[3], pad(r[3], width[3]),
			pad(r[4], width[4]), r[4], r[5], pad(r[5], width[5]))
		if n > 0 {
			_, right, _ := strings.Cut(bar(ranked[n-1].MeanAbs, scale), "│")
			line += "  " + right
		}
		fmt.Fprintln(w, strings.TrimRight(line, " "))
	}
	if hidden > 0 {
		fmt.Fprintf(w, "  (%d tokens with smaller mean |a| not shown; -format json lists all)\n", hidden)
	}
}
