package main

import (
	"encoding/json"
	"fmt"
	"io"
	"sort"
	"text/tabwriter"

	"github.com/apportion/apportion/explain"
)

func runInspect(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("inspect", "-model PATH [-format table|json]",
		"apportion inspect -model model.onnx -format json",
		"Lists the inputs a caller binds (initializer-backed inputs are parameters),\n"+
			"the outputs, the default-domain opset, the producer, the node count per\n"+
			"operator, the number of float parameters, the metadata and the operators\n"+
			"apportion cannot run.", stderr)
	modelPath := fs.String("model", "", "ONNX model `file` (required)")
	format := fs.String("format", "table", "output format: table or json")
	if code, done := parseFlags(fs, args, stdout); done {
		return code
	}
	if *modelPath == "" {
		return usageError(stderr, "inspect", "-model is required")
	}
	if *format != "table" && *format != "json" {
		return usageError(stderr, "inspect", "-format must be table or json, got %q", *format)
	}
	m, err := explain.ReadModel(*modelPath)
	if err != nil {
		return failure(stderr, "inspect", err)
	}
	rep := m.Describe()
	if *format == "json" {
		enc := json.NewEncoder(stdout)
		enc.SetIndent("", "  ")
		if err := enc.Encode(rep); err != nil {
			return failure(stderr, "inspect", err)
		}
		return exitOK
	}
	writeInspectTable(stdout, *modelPath, rep)
	return exitOK
}

func writeInspectTable(w io.Writer, path string, rep *explain.Description) {
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintf(tw, "model\t%s\n", path)
	fmt.Fprintf(tw, "producer\t%s\n", rep.Producer)
	fmt.Fprintf(tw, "opset\t%d\n", rep.Opset)
	fmt.Fprintf(tw, "parameters\t%d\n", rep.Parameters)
	tw.Flush()
	section := func(title string, vals []explain.Value) {
		fmt.Fprintf(w, "\n%s\n", title)
		tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
		for _, v := range vals {
			fmt.Fprintf(tw, "  %s\t%s\t%s\n", v.Name, v.Type, shapeTextAny(v.Shape))
		}
		tw.Flush()
	}
	section("inputs", rep.Inputs)
	section("outputs", rep.Outputs)

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

	if len(rep.Unsupported) == 0 {
		fmt.Fprintf(w, "\nunsupported operators: none\n")
		return
	}
	fmt.Fprintf(w, "\nunsupported operators (%d nodes)\n", len(rep.Unsupported))
	tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	for _, u := range rep.Unsupported {
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
