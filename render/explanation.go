package render

import (
	"encoding/csv"
	"fmt"
	"io"
	"math"
	"reflect"
	"sort"
	"strconv"
	"strings"
	"unicode/utf8"

	"codeberg.org/sbinet/npyio/npy"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// barWidth is the number of character cells of each half of a bar.
const barWidth = 12

// bar draws v/scale as a signed bar (see the function bar), in the colour
// scheme's terminal colours with o.Color.
func (o Options) bar(v, scale float64) string {
	b := bar(v, scale)
	if !o.Color {
		return b
	}
	left, right, _ := strings.Cut(b, "│")
	return paint(left, termNegative) + "│" + paint(right, termPositive)
}

// paint wraps the non-blank part of s in the ANSI 256-colour escape for
// colour c.
func paint(s string, c int) string {
	t := strings.TrimSpace(s)
	if t == "" {
		return s
	}
	i := strings.Index(s, t)
	return s[:i] + "\x1b[38;5;" + strconv.Itoa(c) + "m" + t + "\x1b[0m" + s[i+len(t):]
}

// bar draws v/scale as a signed bar: a left half that fills leftwards for
// negative values and a right half that fills rightwards for positive ones,
// in eighths of a cell on the right and halves on the left (Unicode has
// right-aligned blocks in halves and eighths only at the extremes).
func bar(v, scale float64) string {
	left := strings.Repeat(" ", barWidth)
	right := strings.Repeat(" ", barWidth)
	if scale > 0 && !math.IsNaN(v) {
		f := math.Min(math.Abs(v)/scale, 1)
		if v < 0 {
			halves := int(math.Round(f * barWidth * 2))
			s := strings.Repeat("█", halves/2)
			if halves%2 == 1 {
				s = "▐" + s
			}
			left = strings.Repeat(" ", barWidth-utf8.RuneCountInString(s)) + s
		} else if v > 0 {
			eighths := int(math.Round(f * barWidth * 8))
			s := strings.Repeat("█", eighths/8)
			if r := eighths % 8; r > 0 {
				s += string([]rune("▏▎▍▌▋▊▉")[r-1])
			}
			right = s + strings.Repeat(" ", barWidth-utf8.RuneCountInString(s))
		}
	}
	return left + "│" + right
}

// Sort orders the features of a table or chart.
type Sort int

// The orders.
const (
	// SortModel keeps the model's order of the features.
	SortModel Sort = iota
	// SortAbs puts the largest |attribution| first.
	SortAbs
	// SortValue puts the largest attribution first, the most negative last.
	SortValue
)

// ParseSort reads an order as the command line writes it: model, abs or
// value.
func ParseSort(s string) (Sort, error) {
	for i, name := range sortNames {
		if s == name {
			return Sort(i), nil
		}
	}
	return 0, fmt.Errorf("must be model, abs or value, got %q", s)
}

var sortNames = []string{"model", "abs", "value"}

func (s Sort) String() string {
	if s >= 0 && int(s) < len(sortNames) {
		return sortNames[s]
	}
	return "Sort(" + strconv.Itoa(int(s)) + ")"
}

// MaxFeatures is the number of features a table or chart shows at most; a
// larger sample shows those with the largest |attribution|.
const MaxFeatures = 64

// Options tune the tables and charts of explanations. The zero value shows
// every feature (at most MaxFeatures) in the model's order, without colour,
// and names settings as command-line flags.
type Options struct {
	// Sort orders the features shown.
	Sort Sort
	// Top shows only the Top features of largest |attribution|; 0 shows
	// all (at most MaxFeatures).
	Top int
	// Color draws the table's bars in the colour scheme (see Palette) with
	// ANSI escape codes, for a terminal that shows them.
	Color bool
	// FieldName names a setting in the warnings' suggestions; nil names
	// it as a command-line flag: -logits.
	FieldName func(explain.Field) string
}

func (o Options) fieldName(f explain.Field) string {
	if o.FieldName != nil {
		return o.FieldName(f)
	}
	return "-" + string(f)
}

// selection returns the features of attributions a to show, in the order
// asked for, and how many are left out.
func (o Options) selection(a []float64) (order []int, hidden int) {
	order = make([]int, len(a))
	for i := range order {
		order[i] = i
	}
	keep := len(a)
	if o.Top > 0 {
		keep = min(keep, o.Top)
	}
	keep = min(keep, MaxFeatures)
	if keep < len(a) {
		sort.SliceStable(order, func(i, j int) bool { return math.Abs(a[order[i]]) > math.Abs(a[order[j]]) })
		hidden = len(a) - keep
		order = order[:keep]
		sort.Ints(order)
	}
	switch o.Sort {
	case SortAbs:
		sort.SliceStable(order, func(i, j int) bool { return math.Abs(a[order[i]]) > math.Abs(a[order[j]]) })
	case SortValue:
		sort.SliceStable(order, func(i, j int) bool { return a[order[i]] > a[order[j]] })
	}
	return order, hidden
}

// hiddenNote says that hidden of n features are not shown.
func (o Options) hiddenNote(hidden, n int) string {
	if o.Top > 0 && o.Top < MaxFeatures {
		return fmt.Sprintf("%d of %s not shown: -top %d keeps those with the largest |attribution|", hidden, Count(n, "feature", "features"), o.Top)
	}
	return fmt.Sprintf("%d of %s with the smallest |attribution| not shown; -format json, csv or npy lists all", hidden, Count(n, "feature", "features"))
}

// Scale is the half-width of the bars or axis an explanation is drawn on,
// and what it is: the largest |attribution|, and no less than
// |f(x) − f(x′)| (at least gradattr.CompletenessFloor) when the
// attributions are shares of that difference (the method reports
// completeness) or a warning says they are negligible. So attributions of
// 1e-20 are drawn as what they are, not as full bars. For the gradient and
// SmoothGrad, which have no baseline, f(x′) is 0.
func Scale(e explain.Explanation) (scale float64, what string) {
	r := e.Result
	for _, a := range r.Attributions {
		if !math.IsNaN(a) && !math.IsInf(a, 0) {
			scale = math.Max(scale, math.Abs(a))
		}
	}
	what = "the largest |attribution|"
	if r.Completeness != nil || len(e.Warnings) > 0 {
		if d := math.Max(math.Abs(r.Output-r.BaselineOutput), gradattr.CompletenessFloor); d >= scale {
			what = "|output − baseline output|"
			if r.Completeness == nil {
				what = "|output|"
			}
			return d, what
		}
	}
	if scale == 0 {
		return 1, "1: every attribution is 0"
	}
	return scale, what
}

// Table prints the explanations for people: per sample the target and its
// output, its warnings, one row per feature (its label, value and
// attribution, with its standard error when the method has one and a signed
// bar; see Options for which and in what order), the bars' scale, the group
// sums, the completeness check, the surrogate's fit and the cost.
func Table(w io.Writer, rep *explain.Report, opt Options) error {
	labels := rep.Labels()
	classes := rep.Model.Meta.Classes
	fmt.Fprintf(w, "model %s  output %s  method %s", rep.Model.Name, outputLabel(rep), rep.Settings.Method)
	if rep.Layer != "" {
		fmt.Fprintf(w, "  layer %s %s", rep.Layer, samples.ShapeString(rep.LayerShape()))
	}
	fmt.Fprintln(w)
	for _, e := range rep.Explanations {
		fmt.Fprintln(w)
		if e.Err != nil {
			fmt.Fprintf(w, "sample %d: error: %v\n", e.Index, e.Err)
			continue
		}
		r := e.Result
		target := strconv.Itoa(r.Target)
		if r.Target >= 0 && r.Target < len(classes) {
			target += " (" + classes[r.Target] + ")"
		}
		fmt.Fprintf(w, "sample %d: target %s  output %s", e.Index, target, Number(r.Output))
		if e.BaselineOutputs != nil || r.Completeness != nil {
			fmt.Fprintf(w, "  baseline output %s", Number(r.BaselineOutput))
		}
		fmt.Fprintln(w)
		for _, wn := range e.Warnings {
			fmt.Fprintln(w, wrap("  warning: "+wn.Message+opt.suggestion(wn), "    ", tableWidth))
		}

		if rep.Tokens {
			labels = rep.SampleLabels(e)
		}
		order, hidden := opt.selection(r.Attributions)
		scale, what := Scale(e)
		rows := [][4]string{{"feature", "value", "attribution", "± s.e."}}
		if rep.Tokens {
			rows[0] = [4]string{"token", "id", "attribution", "± s.e."}
		}
		for _, i := range order {
			label := strconv.Itoa(i)
			if i < len(labels) {
				label = labels[i]
			}
			value := ""
			if vals := rep.FeatureValues(e); i < len(vals) {
				value = Number(vals[i])
			}
			se := ""
			if r.StandardErrors != nil {
				se = Number(r.StandardErrors[i])
			}
			rows = append(rows, [4]string{label, value, signed(r.Attributions[i]), se})
		}
		var width [4]int
		for _, row := range rows {
			for k, cell := range row {
				width[k] = max(width[k], utf8.RuneCountInString(cell))
			}
		}
		for n, row := range rows {
			// Names left-aligned, numbers right-aligned.
			line := row[0] + strings.Repeat(" ", width[0]-utf8.RuneCountInString(row[0])) +
				"  " + strings.Repeat(" ", width[1]-utf8.RuneCountInString(row[1])) + row[1] +
				"  " + strings.Repeat(" ", width[2]-utf8.RuneCountInString(row[2])) + row[2]
			if r.StandardErrors != nil {
				line += "  " + strings.Repeat(" ", width[3]-utf8.RuneCountInString(row[3])) + row[3]
			}
			if n > 0 {
				line += "  " + opt.bar(r.Attributions[order[n-1]], scale)
			}
			fmt.Fprintln(w, strings.TrimRight("  "+line, " "))
		}
		fmt.Fprintf(w, "  (a full bar is %s, %s)\n", Number(scale), what)
		if hidden > 0 {
			fmt.Fprintf(w, "  (%s)\n", opt.hiddenNote(hidden, len(r.Attributions)))
		}
		if g := e.Grouped; g != nil {
			writeGroupTable(w, g, e, opt)
		}
		if cp := r.Completeness; cp != nil {
			verdict := "ok"
			switch {
			case !cp.Judged:
				verdict = "not judged (the method does not promise completeness)"
			case !cp.OK:
				verdict = "NOT ok"
			}
			tol := "  tolerance " + Number(cp.Tolerance)
			if !cp.Judged {
				tol = ""
			}
			fmt.Fprintf(w, "completeness: sum %s  expected %s  gap %s  relative gap %s%s  %s\n",
				Number(cp.Sum), Number(cp.Expected), signed(cp.Gap), Number(cp.RelativeGap), tol, verdict)
		}
		if fit := r.Surrogate; fit != nil {
			fmt.Fprintf(w, "surrogate: intercept %s  fidelity (weighted R²) %s\n", Number(fit.Intercept), Number(fit.Fidelity))
		}
		evals := Count(r.Cost.GradientEvals, "gradient evaluation", "gradient evaluations")
		switch {
		case r.Settings.Exact:
			evals = "exact integral over " + Count(r.Settings.Pieces, "piece", "pieces") + " of the path"
		case r.Settings.ErrorEstimate > 0:
			evals += " (estimated error " + Number(r.Settings.ErrorEstimate) + ")"
		}
		fmt.Fprintf(w, "cost: %s, %s, %s\n", evals,
			Count(r.Cost.ForwardPasses, "forward pass", "forward passes"), r.Cost.Elapsed.Round(10_000))
		if r.Settings.ExactSkipped != "" {
			fmt.Fprintf(w, "by quadrature, not exact: %s\n", r.Settings.ExactSkipped)
		}
	}
	return nil
}

// tableWidth is the width, in characters, that the table's long lines are
// wrapped to.
const tableWidth = 100

// wrap breaks s between words into lines of at most width characters, the
// lines after the first indented by indent.
func wrap(s, indent string, width int) string {
	var b strings.Builder
	line := 0
	for i, word := range strings.Split(s, " ") {
		n := utf8.RuneCountInString(word)
		switch {
		case i == 0:
		case line+1+n > width:
			b.WriteString("\n" + indent)
			line = utf8.RuneCountInString(indent)
		default:
			b.WriteByte(' ')
			line++
		}
		b.WriteString(word)
		line += n
	}
	return b.String()
}

// suggestion words a warning's suggested settings: "; try -logits".
func (o Options) suggestion(w explain.Warning) string {
	if len(w.Suggest) == 0 {
		return ""
	}
	names := make([]string, len(w.Suggest))
	for i, f := range w.Suggest {
		names[i] = o.fieldName(f)
	}
	switch w.Suggest[0] {
	case explain.FieldBaseline:
		names[0] = "another " + names[0]
	case explain.FieldNoise:
		names[0] = "a smaller " + names[0]
	}
	return "; try " + strings.Join(names, " or ")
}

// outputLabel names the output explained: its name, and "(logits)" when
// the logits before its final Softmax, LogSoftmax or Sigmoid are explained.
func outputLabel(rep *explain.Report) string {
	if rep.Settings.Logits {
		return rep.Output + " (logits)"
	}
	return rep.Output
}

// Count writes n with the singular or the plural noun: "1 forward pass",
// "2 forward passes".
func Count(n int, one, many string) string {
	if n == 1 {
		return "1 " + one
	}
	return strconv.Itoa(n) + " " + many
}

// Number formats v for people, with five significant digits.
func Number(v float64) string { return strconv.FormatFloat(v, 'g', 5, 64) }

// signed is Number with a sign: +0.5, -0.5, 0.
func signed(v float64) string {
	if v == 0 {
		return "0"
	}
	s := Number(v)
	if v >= 0 && !strings.HasPrefix(s, "+") {
		s = "+" + s
	}
	return s
}

// CSV writes one record per feature of each explained sample: sample,
// feature, value, attribution (shortest decimals); with feature groups, one
// record per group instead: sample, group, attribution, in the groups'
// order. Failed samples have no records.
func CSV(w io.Writer, rep *explain.Report) error {
	if rep.Settings.Groups != nil {
		return groupsCSV(w, rep)
	}
	labels := rep.Labels()
	cw := csv.NewWriter(w)
	if err := cw.Write([]string{"sample", "feature", "value", "attribution"}); err != nil {
		return err
	}
	for _, e := range rep.Explanations {
		if e.Err != nil {
			continue
		}
		if rep.Tokens {
			labels = rep.SampleLabels(e)
		}
		for i, a := range e.Result.Attributions {
			label := strconv.Itoa(i)
			if i < len(labels) {
				label = labels[i]
			}
			value := ""
			if vals := rep.FeatureValues(e); i < len(vals) {
				value = strconv.FormatFloat(vals[i], 'g', -1, 64)
			}
			rec := []string{strconv.Itoa(e.Index), label, value, strconv.FormatFloat(a, 'g', -1, 64)}
			if err := cw.Write(rec); err != nil {
				return err
			}
		}
	}
	cw.Flush()
	return cw.Error()
}

// groupsCSV writes one record per group of each explained sample.
func groupsCSV(w io.Writer, rep *explain.Report) error {
	cw := csv.NewWriter(w)
	if err := cw.Write([]string{"sample", "group", "attribution"}); err != nil {
		return err
	}
	for _, e := range rep.Explanations {
		if e.Err != nil || e.Grouped == nil {
			continue
		}
		for i, a := range e.Grouped.Attributions {
			if err := cw.Write([]string{strconv.Itoa(e.Index), e.Grouped.Names[i], strconv.FormatFloat(a, 'g', -1, 64)}); err != nil {
				return err
			}
		}
	}
	cw.Flush()
	return cw.Error()
}

// GroupsNPY writes the attributions summed per group as one float64 .npy
// array of shape (samples, groups), the groups in their order; a failed
// sample's row is NaN.
func GroupsNPY(w io.Writer, rep *explain.Report) error {
	n := len(rep.Settings.Groups)
	data := make([]float64, 0, len(rep.Explanations)*n)
	for _, e := range rep.Explanations {
		if e.Err != nil || e.Grouped == nil || len(e.Grouped.Attributions) != n {
			for range n {
				data = append(data, math.NaN())
			}
			continue
		}
		data = append(data, e.Grouped.Attributions...)
	}
	return npy.Write(w, nested(data, []int{len(rep.Explanations), n}))
}

// NPY writes the attributions as one float64 .npy array of shape
// (samples, ...sample shape); a failed sample's row is NaN.
func NPY(w io.Writer, rep *explain.Report) error {
	shape := append([]int{len(rep.Explanations)}, rep.Batch.SampleShape()...)
	per := rep.Batch.SampleSize()
	if rep.Layer != "" {
		shape = append([]int{len(rep.Explanations)}, rep.Shape...)
		per = samples.Product(rep.Shape)
	}
	data := make([]float64, 0, len(rep.Explanations)*per)
	for _, e := range rep.Explanations {
		if e.Err != nil || len(e.Result.Attributions) != per {
			for i := 0; i < per; i++ {
				data = append(data, math.NaN())
			}
			continue
		}
		data = append(data, e.Result.Attributions...)
	}
	return npy.Write(w, nested(data, shape))
}

// nested builds [][]...float64 of the given shape over data, which npy
// writes with that shape.
func nested(data []float64, shape []int) any {
	if len(shape) == 0 {
		if len(data) == 0 {
			return 0.0
		}
		return data[0]
	}
	if len(shape) == 1 {
		return data[:shape[0]]
	}
	t := reflect.TypeOf(float64(0))
	for range shape[1:] {
		t = reflect.SliceOf(t)
	}
	s := reflect.MakeSlice(reflect.SliceOf(t), shape[0], shape[0])
	step := samples.Product(shape[1:])
	for i := 0; i < shape[0]; i++ {
		s.Index(i).Set(reflect.ValueOf(nested(data[i*step:(i+1)*step], shape[1:])))
	}
	return s.Interface()
}

// writeGroupTable prints the attributions summed per group, in the
// groups' order, on the scale of Scale (of the group sums).
func writeGroupTable(w io.Writer, g *gradattr.GroupedResult, e explain.Explanation, opt Options) {
	r := *e.Result
	r.Attributions = g.Attributions
	e.Result = &r
	scale, what := Scale(e)
	width := utf8.RuneCountInString("group")
	for _, n := range g.Names {
		width = max(width, utf8.RuneCountInString(n))
	}
	vals := make([]string, len(g.Attributions))
	vw := utf8.RuneCountInString("attribution")
	for i, a := range g.Attributions {
		vals[i] = signed(a)
		if g.StandardErrors != nil {
			vals[i] += " ± " + Number(g.StandardErrors[i])
		}
		vw = max(vw, utf8.RuneCountInString(vals[i]))
	}
	pad := func(s string, n int) string { return strings.Repeat(" ", n-utf8.RuneCountInString(s)) }
	fmt.Fprintf(w, "  %s%s  %s%s\n", "group", pad("group", width), pad("attribution", vw), "attribution")
	for i, n := range g.Names {
		fmt.Fprintf(w, "  %s%s  %s%s  %s\n", n, pad(n, width), pad(vals[i], vw), vals[i], strings.TrimRight(opt.bar(g.Attributions[i], scale), " "))
	}
	fmt.Fprintf(w, "  (a full bar is %s, %s)\n", Number(scale), what)
	if !g.Partition {
		fmt.Fprintf(w, "  (the groups overlap or miss features: %d overlapping, %d missing; their sums need not add up to the total)\n",
			len(g.Coverage.Overlapping), len(g.Coverage.Missing))
	}
}
