package main

import (
	"encoding/csv"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"reflect"
	"sort"
	"strconv"
	"strings"
	"unicode/utf8"

	"codeberg.org/sbinet/npyio/npy"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// maxTableFeatures is the number of features the table shows per sample; a
// larger sample shows those with the largest |attribution|.
const maxTableFeatures = 64

// barWidth is the number of character cells of each half of a bar.
const barWidth = 12

func renderExplanation(w io.Writer, c *explainConfig, rep *explainReport) error {
	switch c.format {
	case "json":
		return writeExplainJSON(w, c, rep)
	case "csv":
		return writeExplainCSV(w, rep)
	case "npy":
		return writeExplainNPY(w, rep)
	default:
		return writeExplainTable(w, c, rep)
	}
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

func writeExplainTable(w io.Writer, c *explainConfig, rep *explainReport) error {
	src := rep.src
	labels := src.labels()
	fmt.Fprintf(w, "model %s  output %s  method %s\n", src.modelName, src.output, c.method)
	for _, e := range rep.Explanations {
		fmt.Fprintln(w)
		if e.err != nil {
			fmt.Fprintf(w, "sample %d: error: %v\n", e.Index, e.err)
			continue
		}
		r := e.Result
		target := strconv.Itoa(r.Target)
		if r.Target >= 0 && r.Target < len(src.meta.Classes) {
			target += " (" + src.meta.Classes[r.Target] + ")"
		}
		fmt.Fprintf(w, "sample %d: target %s  output %s", e.Index, target, fmtNum(r.Output))
		if r.Completeness != nil {
			fmt.Fprintf(w, "  baseline output %s", fmtNum(r.BaselineOutput))
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
			if i < len(e.Value) {
				value = fmtNum(e.Value[i])
			}
			rows = append(rows, [3]string{label, value, fmtSigned(r.Attributions[i])})
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
			tol := "  tolerance " + fmtNum(cp.Tolerance)
			if !cp.Judged {
				tol = ""
			}
			fmt.Fprintf(w, "completeness: sum %s  expected %s  gap %s  relative gap %s%s  %s\n",
				fmtNum(cp.Sum), fmtNum(cp.Expected), fmtSigned(cp.Gap), fmtNum(cp.RelativeGap), tol, verdict)
		}
		fmt.Fprintf(w, "cost: %d gradient evaluations, %d forward passes, %s\n",
			r.Cost.GradientEvals, r.Cost.ForwardPasses, r.Cost.Elapsed.Round(10_000))
	}
	return nil
}

func fmtNum(v float64) string { return strconv.FormatFloat(v, 'g', 5, 64) }

func fmtSigned(v float64) string {
	if v == 0 {
		return "0"
	}
	s := fmtNum(v)
	if v >= 0 && !strings.HasPrefix(s, "+") {
		s = "+" + s
	}
	return s
}

// explainModelJSON identifies the model and the values explained.
type explainModelJSON struct {
	Path   string `json:"path"`
	SHA256 string `json:"sha256"`
	Input  string `json:"input"`
	Output string `json:"output"`
}

// explanationJSON is one sample's record.
type explanationJSON struct {
	Index           int                    `json:"index"`
	Target          *int                   `json:"target"`
	Outputs         numbers                `json:"outputs"`
	Attributions    numbers                `json:"attributions"`
	Shape           []int                  `json:"shape"`
	BaselineOutputs numbers                `json:"baseline_outputs"`
	Completeness    *gradattr.Completeness `json:"completeness"`
	Points          int                    `json:"points"`
	Error           *string                `json:"error"`
	// Groups is present with -groups: the attributions summed per group.
	Groups *gradattr.GroupedResult `json:"groups,omitempty"`
}

// explainJSON is explain's JSON document.
type explainJSON struct {
	Model        explainModelJSON  `json:"model"`
	Method       gradattr.Method   `json:"method"`
	Settings     map[string]any    `json:"settings"`
	Explanations []explanationJSON `json:"explanations"`
}

// settingsJSON is the request's settings in one representation: the
// library's record of the method's options (gradattr.Options.Settings,
// defaults filled in), then what selects the explained value (target,
// logits, output) and the name of the reference set. reference names it,
// "" without one.
func settingsJSON(c *explainConfig, src *source, o gradattr.Options, reference string) map[string]any {
	s := map[string]any{}
	if raw, err := json.Marshal(o.Settings()); err == nil {
		_ = json.Unmarshal(raw, &s)
	}
	delete(s, "method") // a key of the document itself
	s["target"], s["logits"], s["output"] = c.targetText, c.logits, src.output
	if c.target >= 0 {
		s["target"] = c.target
	}
	if reference != "" {
		s["reference"] = reference
	}
	return s
}

func writeExplainJSON(w io.Writer, c *explainConfig, rep *explainReport) error {
	src := rep.src
	doc := explainJSON{
		Model:        explainModelJSON{Path: src.modelName, SHA256: src.sha256, Input: src.spec.Name, Output: src.output},
		Method:       c.method,
		Settings:     settingsJSON(c, src, rep.options, c.reference),
		Explanations: []explanationJSON{},
	}
	shape := src.samples.SampleShape()
	if shape == nil {
		shape = []int{}
	}
	for _, e := range rep.Explanations {
		j := explanationJSON{Index: e.Index, Shape: shape}
		if e.err != nil {
			msg := e.err.Error()
			j.Error = &msg
		} else {
			r := e.Result
			t := r.Target
			j.Target = &t
			j.Outputs = numbers{vals: nonNil(r.Outputs), bits: 64}
			j.Attributions = numbers{vals: nonNil(r.Attributions), bits: 64}
			if len(r.Shape) > 0 {
				j.Shape = r.Shape
			}
			if e.Baselines != nil {
				j.BaselineOutputs = numbers{vals: e.Baselines, bits: 64}
			}
			j.Completeness = r.Completeness
			j.Points = r.Cost.GradientEvals
			j.Groups = e.Grouped
		}
		doc.Explanations = append(doc.Explanations, j)
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(doc)
}

func nonNil(v []float64) []float64 {
	if v == nil {
		return []float64{}
	}
	return v
}

func writeExplainCSV(w io.Writer, rep *explainReport) error {
	labels := rep.src.labels()
	cw := csv.NewWriter(w)
	if err := cw.Write([]string{"sample", "feature", "value", "attribution"}); err != nil {
		return err
	}
	for _, e := range rep.Explanations {
		if e.err != nil {
			continue
		}
		for i, a := range e.Result.Attributions {
			label := strconv.Itoa(i)
			if i < len(labels) {
				label = labels[i]
			}
			value := ""
			if i < len(e.Value) {
				value = strconv.FormatFloat(e.Value[i], 'g', -1, 64)
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

// writeExplainNPY writes the attributions as one float64 array of shape
// (samples, ...sample shape); a failed sample's row is NaN.
func writeExplainNPY(w io.Writer, rep *explainReport) error {
	shape := append([]int{len(rep.Explanations)}, rep.src.samples.SampleShape()...)
	per := rep.src.samples.SampleSize()
	data := make([]float64, 0, len(rep.Explanations)*per)
	for _, e := range rep.Explanations {
		if e.err != nil || len(e.Result.Attributions) != per {
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
		vals[i] = fmtSigned(a)
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
