package render

import (
	"fmt"
	"io"
	"sort"
	"strconv"
	"strings"
	"text/tabwriter"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// PredictionTable prints, sample by sample (count of them, the first axis
// of the batched outputs), each output's values; an output with one value
// per class name is printed as a class table with the largest value
// marked. rows, when given, are the samples' indices in the input (some
// were left out); otherwise they are numbered from 0.
func PredictionTable(w io.Writer, outs []explain.Output, count int, rows []int, classes []string) {
	if count < 1 {
		count = 1
	}
	for s := 0; s < count; s++ {
		if s > 0 {
			fmt.Fprintln(w)
		}
		label := s
		if s < len(rows) {
			label = rows[s]
		}
		fmt.Fprintf(w, "sample %d\n", label)
		for _, o := range outs {
			vals := o.Data.Values
			per := len(vals)
			lo := 0
			if len(o.Shape) > 0 && o.Shape[0] == count {
				per = len(vals) / count
				lo = s * per
			} else if s > 0 {
				continue // not batched: printed with sample 0
			}
			row := vals[lo : lo+per]
			if len(classes) == per && per > 0 {
				fmt.Fprintf(w, "  %s\n", o.Name)
				tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
				top := gradattr.Top(row)
				for j, v := range row {
					mark := ""
					if j == top {
						mark = "  <- top"
					}
					fmt.Fprintf(tw, "    %s\t%s%s\n", classes[j], formatValue(v, o.Data.Bits), mark)
				}
				tw.Flush()
				continue
			}
			parts := make([]string, len(row))
			for j, v := range row {
				parts[j] = formatValue(v, o.Data.Bits)
			}
			fmt.Fprintf(w, "  %s  [%s]\n", o.Name, strings.Join(parts, " "))
		}
	}
}

func formatValue(v float64, bits int) string {
	return strconv.FormatFloat(v, 'g', 6, bits)
}

// DescriptionTable prints a model's description (explain.Model.Describe)
// for people: the facts, then the inputs, outputs, operators, metadata and
// the operators the engine cannot run. path names the model.
func DescriptionTable(w io.Writer, path string, rep *explain.Description) {
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintf(tw, "model\t%s\n", path)
	fmt.Fprintf(tw, "producer\t%s\n", rep.Producer)
	opset := fmt.Sprintf("%d", rep.Opset)
	if rep.MaxOpset > 0 && rep.Opset > rep.MaxOpset {
		opset += fmt.Sprintf(" (newer than %d, the newest apportion reads)", rep.MaxOpset)
	}
	fmt.Fprintf(tw, "opset\t%s\n", opset)
	fmt.Fprintf(tw, "parameters\t%d\n", rep.Parameters)
	tw.Flush()
	section := func(title string, vals []explain.Value) {
		fmt.Fprintf(w, "\n%s\n", title)
		tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
		for _, v := range vals {
			fmt.Fprintf(tw, "  %s\t%s\t%s", v.Name, v.Type, shapeTextAny(v.Shape))
			if use := useText[v.Use]; use != "" {
				fmt.Fprintf(tw, "\t%s", use)
			}
			fmt.Fprintln(tw)
		}
		tw.Flush()
	}
	section("inputs", rep.Inputs)
	section("outputs", rep.Outputs)
	if rep.Values != nil {
		fmt.Fprintf(w, "\nvalues (per sample; -layer NAME attributes to one)\n")
		tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
		for _, v := range rep.Values {
			fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\n", v.Name, v.Op, v.Type, samples.ShapeString(v.Shape))
		}
		tw.Flush()
	}

	total := 0
	names := make([]string, 0, len(rep.Ops))
	for op, n := range rep.Ops {
		names = append(names, op)
		total += n
	}
	sort.Strings(names)
	fmt.Fprintf(w, "\noperators (%d nodes)\n", total)
	tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	for _, op := range names {
		fmt.Fprintf(tw, "  %s\t%d\n", op, rep.Ops[op])
	}
	tw.Flush()

	if len(rep.Metadata) > 0 {
		keys := make([]string, 0, len(rep.Metadata))
		for k := range rep.Metadata {
			keys = append(keys, k)
		}
		sort.Strings(keys)
		fmt.Fprintf(w, "\nmetadata\n")
		tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
		for _, k := range keys {
			fmt.Fprintf(tw, "  %s\t%s\n", k, rep.Metadata[k])
		}
		tw.Flush()
	}

	nodes := func(title string, us []explain.Unsupported) {
		if len(us) == 0 {
			fmt.Fprintf(w, "\n%s: none\n", title)
			return
		}
		fmt.Fprintf(w, "\n%s (%d nodes)\n", title, len(us))
		tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
		for _, u := range us {
			op := u.Op
			if u.Domain != "" && u.Domain != "ai.onnx" {
				op = u.Domain + "." + op
			}
			node := u.Node
			if node == "" {
				node = "(unnamed)"
			}
			fmt.Fprintf(tw, "  %s\tnode %s\n", op, node)
		}
		tw.Flush()
	}
	nodes("unsupported operators", rep.Unsupported)
	if len(rep.FoldOnly) > 0 {
		nodes("operators computed only on constants, reading run-time values", rep.FoldOnly)
	}
	if rep.Explainable != "" {
		fmt.Fprintf(w, "\nexplainable: %s\n", rep.Explainable)
	}
}

// useText says, for the inspect table, what a model does with an input
// whose use is not plain data (explain.Value.Use).
var useText = map[string]string{
	"indices":      "indices, read at run time",
	"compile-time": "read when compiling: a program per value",
	"unread":       "not read by the model",
}

func shapeTextAny(s []any) string {
	if s == nil {
		return "unknown"
	}
	out := "["
	for i, d := range s {
		if i > 0 {
			out += " "
		}
		out += fmt.Sprint(d)
	}
	return out + "]"
}
