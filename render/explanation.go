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

// maxTableFeatures is the number of features the table shows per sample; a
// larger sample shows those with the largest |attribution|.
const maxTableFeatures = 64

// barWidth is the number of character cells of each half of a bar.
const barWidth = 12

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

// Table prints the explanations for people: per sample the target and its
// output, one row per feature (its label, value and attribution, with a
// signed bar; the 64 largest |attribution| when there are more), the
// group sums, the completeness check and the cost.
func Table(w io.Writer, rep *explain.Report) error {
	labels := rep.Labels()
	classes := rep.Model.Meta.Classes
	fmt.Fprintf(w, "model %s  output %s  method %s\n", rep.Model.Name, rep.Output, rep.Settings.Method)
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
		if r.Completeness != nil {
			fmt.Fprintf(w, "  baseline output %s", Number(r.BaselineOutput))
		}
		fmt.Fprintln(w)

		order := make([]int, len(r.Attributions))
		for i := range order {
			order[i] = i
		}
		scale := 0.0
		for _, a := range r.Attributions {
			scale = math.Max(scale, math.Abs(a))
		}
		hidden := 0
		if len(order) > maxTableFeatures {
			sort.SliceStable(order, func(a, b int) bool {
				return math.Abs(r.Attributions[order[a]]) > math.Abs(r.Attributions[order[b]])
			})
			hidden = len(order) - maxTableFeatures
			order = order[:maxTableFeatures]
		}
		rows := [][3]string{{"feature", "value", "attribution"}}
		for _, i := range order {
			label := strconv.Itoa(i)
			if i < len(labels) {
				label = labels[i]
			}
			value := ""
			if i < len(e.Values) {
				value = Number(e.Values[i])
			}
			rows = append(rows, [3]string{label, value, signed(r.Attributions[i])})
		}
		var width [3]int
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
			if n > 0 {
				line += "  " + bar(r.Attributions[order[n-1]], scale)
			}
			fmt.Fprintln(w, "  "+line)
		}
		if hidden > 0 {
			fmt.Fprintf(w, "(%d features with smaller |attribution| not shown; -format json, csv or npy lists all)\n", hidden)
		}
		if g := e.Grouped; g != nil {
			writeGroupTable(w, g)
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
		if r.Settings.Exact {
			fmt.Fprintf(w, "cost: exact integral over %d pieces of the path, %d forward passes, %s\n",
				r.Settings.Pieces, r.Cost.ForwardPasses, r.Cost.Elapsed.Round(10_000))
		} else {
			fmt.Fprintf(w, "cost: %d gradient evaluations, %d forward passes, %s\n",
				r.Cost.GradientEvals, r.Cost.ForwardPasses, r.Cost.Elapsed.Round(10_000))
		}
		if r.Settings.ExactSkipped != "" {
			fmt.Fprintf(w, "by quadrature, not exact: %s\n", r.Settings.ExactSkipped)
		}
	}
	return nil
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
// feature, value, attribution (shortest decimals). Failed samples have no
// records.
func CSV(w io.Writer, rep *explain.Report) error {
	labels := rep.Labels()
	cw := csv.NewWriter(w)
	if err := cw.Write([]string{"sample", "feature", "value", "attribution"}); err != nil {
		return err
	}
	for _, e := range rep.Explanations {
		if e.Err != nil {
			continue
		}
		for i, a := range e.Result.Attributions {
			label := strconv.Itoa(i)
			if i < len(labels) {
				label = labels[i]
			}
			value := ""
			if i < len(e.Values) {
				value = strconv.FormatFloat(e.Values[i], 'g', -1, 64)
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

// NPY writes the attributions as one float64 .npy array of shape
// (samples, ...sample shape); a failed sample's row is NaN.
func NPY(w io.Writer, rep *explain.Report) error {
	shape := append([]int{len(rep.Explanations)}, rep.Batch.SampleShape()...)
	per := rep.Batch.SampleSize()
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

// writeGroupTable prints the attributions summed per group.
func writeGroupTable(w io.Writer, g *gradattr.GroupedResult) {
	scale := 0.0
	for _, a := range g.Attributions {
		scale = math.Max(scale, math.Abs(a))
	}
	width := utf8.RuneCountInString("group")
	for _, n := range g.Names {
		width = max(width, utf8.RuneCountInString(n))
	}
	vals := make([]string, len(g.Attributions))
	vw := utf8.RuneCountInString("attribution")
	for i, a := range g.Attributions {
		vals[i] = signed(a)
		vw = max(vw, utf8.RuneCountInString(vals[i]))
	}
	pad := func(s string, n int) string { return strings.Repeat(" ", n-utf8.RuneCountInString(s)) }
	fmt.Fprintf(w, "  %s%s  %s%s\n", "group", pad("group", width), pad("attribution", vw), "attribution")
	for i, n := range g.Names {
		fmt.Fprintf(w, "  %s%s  %s%s  %s\n", n, pad(n, width), pad(vals[i], vw), vals[i], bar(g.Attributions[i], scale))
	}
	if !g.Partition {
		fmt.Fprintf(w, "  (the groups overlap or miss features: %d overlapping, %d missing; their sums need not add up to the total)\n",
			len(g.Coverage.Overlapping), len(g.Coverage.Missing))
	}
}
