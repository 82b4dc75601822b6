package onnxlite

import (
	"container/heap"
	"errors"
	"fmt"
	"strings"
)

// ErrInvalid is wrapped by every problem Validate and Infer find that breaks
// the ONNX specification: a missing graph or opset, a duplicate or undefined
// name, a shape that does not fit an operator. Its message starts with
// "invalid model: ".
var ErrInvalid = errors.New("invalid model")

// ErrCycle is wrapped when the graph's nodes depend on each other in a cycle.
// A cycle error also wraps ErrInvalid.
var ErrCycle = errors.New("graph has a cycle")

// ErrUnsupported is wrapped when a valid model asks for something apportion
// does not handle: an operator, a domain, an opset version newer than
// MaxOpset, an attribute value. Its message starts with "not supported by
// apportion: ". *UnsupportedError matches it with errors.Is.
var ErrUnsupported = errors.New("not supported by apportion")

// UnsupportedOp names one node whose operator is not supported.
type UnsupportedOp struct {
	Op     string
	Domain string // empty for the default domain
	Node   string // the node's name, or "#i" (its index) when it has none
}

// UnsupportedError lists every node of a model whose operator is not
// supported: by onnxlite when Validate returns it (see Unsupported), by the
// package that runs the model when that one does.
type UnsupportedError struct {
	Ops []UnsupportedOp
}

// Error lists the unsupported operators with their nodes.
func (e *UnsupportedError) Error() string {
	parts := make([]string, len(e.Ops))
	for i, u := range e.Ops {
		op := u.Op
		if u.Domain != "" {
			op = u.Domain + "." + u.Op
		}
		parts[i] = fmt.Sprintf("%s (node %q)", op, u.Node)
	}
	noun := "operator"
	if len(e.Ops) > 1 {
		noun = "operators"
	}
	return fmt.Sprintf("%v: %s %s", ErrUnsupported, noun, strings.Join(parts, ", "))
}

// Is makes errors.Is(err, ErrUnsupported) true.
func (e *UnsupportedError) Is(target error) bool { return target == ErrUnsupported }

// Unsupported lists the nodes of m whose operator onnxlite does not support
// (see IsSupported), in graph order, without failing. It returns nil for a
// nil model or graph.
func Unsupported(m *Model) []UnsupportedOp {
	if m == nil || m.Graph == nil {
		return nil
	}
	var out []UnsupportedOp
	for i, n := range m.Graph.Nodes {
		if n == nil || IsSupported(n.Domain, n.OpType) {
			continue
		}
		d := n.Domain
		if isDefaultDomain(d) {
			d = ""
		}
		out = append(out, UnsupportedOp{Op: n.OpType, Domain: d, Node: nodeName(n, i)})
	}
	return out
}

// nodeName is the node's name, or "#i" when it has none.
func nodeName(n *Node, i int) string {
	if n.Name != "" {
		return n.Name
	}
	return fmt.Sprintf("#%d", i)
}

// invalidf returns an error wrapping ErrInvalid: "invalid model: " and the
// formatted text.
func invalidf(format string, args ...any) error {
	return fmt.Errorf("%w: "+format, append([]any{ErrInvalid}, args...)...)
}

// unsupportedf returns an error wrapping ErrUnsupported: "not supported by
// apportion: " and the formatted text.
func unsupportedf(format string, args ...any) error {
	return fmt.Errorf("%w: "+format, append([]any{ErrUnsupported}, args...)...)
}

// Validate checks the structure of m and then its operators:
//
//   - the model has a graph and imports the default-domain opset, at a version
//     from MinOpset to MaxOpset (a newer one wraps ErrUnsupported), and every
//     other domain a node uses;
//   - initializer names, graph input names and node output names are unique,
//     except that a graph input may repeat an initializer's name (models of IR
//     version < 4 list initializers as inputs);
//   - every non-empty node input and every graph output is produced by a graph
//     input, an initializer or a node;
//   - the nodes form no cycle (ErrCycle names the nodes on one).
//
// Validate does not modify m: nodes out of topological order stay where they
// are (Infer visits them in order). Structural problems wrap ErrInvalid;
// after them, the operators onnxlite does not support are reported all at
// once as an *UnsupportedError.
func (m *Model) Validate() error {
	_, err := m.validate()
	return err
}

// validate is Validate, and returns the indices of m's nodes in a
// topological order: a stable Kahn sort, which keeps graph order among
// nodes ready at the same time.
func (m *Model) validate() ([]int, error) {
	if m == nil || m.Graph == nil {
		return nil, invalidf("expected a model with a graph, got none")
	}
	g := m.Graph
	hasDefault := false
	imported := map[string]bool{}
	for _, o := range m.Opsets {
		d := o.Domain
		if isDefaultDomain(d) {
			d = ""
			hasDefault = true
			if o.Version > MaxOpset {
				return nil, unsupportedf("the model imports ONNX opset %d, newer than %d, the newest apportion reads: re-export the model at opset %d", o.Version, MaxOpset, MaxOpset)
			}
			if o.Version < MinOpset {
				return nil, invalidf("the model imports ONNX opset %d: expected a version from %d", o.Version, MinOpset)
			}
		}
		imported[d] = true
	}
	if !hasDefault && len(m.Opsets) > 0 && !usesDefaultDomain(g) {
		// Valid ONNX (an opset_import entry for every domain the nodes
		// use), but none of the operators apportion runs.
		return nil, unsupportedf("the model's operators come only from %s; apportion reads the ONNX operator set (domain \"\" or \"ai.onnx\")", describeOpsets(m.Opsets))
	}
	if !hasDefault {
		return nil, invalidf("expected an opset_import for the default domain (\"\" or \"ai.onnx\"), got %s", describeOpsets(m.Opsets))
	}

	// producer records what defines each name: "initializer", "input" or a node.
	producer := map[string]string{}
	inits := map[string]bool{}
	for i, t := range g.Initializers {
		if t == nil {
			return nil, invalidf("initializer #%d is nil", i)
		}
		if t.Name == "" {
			return nil, invalidf("initializer #%d: expected a name, got an empty one", i)
		}
		if inits[t.Name] {
			return nil, invalidf("initializer %q: name defined twice", t.Name)
		}
		inits[t.Name] = true
		producer[t.Name] = "initializer"
	}
	inputs := map[string]bool{}
	for i, v := range g.Inputs {
		if v == nil || v.Name == "" {
			return nil, invalidf("graph input #%d: expected a name, got none", i)
		}
		if inputs[v.Name] {
			return nil, invalidf("graph input %q: name listed twice", v.Name)
		}
		inputs[v.Name] = true
		if !inits[v.Name] {
			producer[v.Name] = "graph input"
		}
	}
	for i, n := range g.Nodes {
		if n == nil {
			return nil, invalidf("node #%d is nil", i)
		}
		if !isDefaultDomain(n.Domain) && !imported[n.Domain] {
			return nil, invalidf("node %q (%s): domain %q is not imported: expected it in opset_import, got %s",
				nodeName(n, i), n.OpType, n.Domain, describeOpsets(m.Opsets))
		}
		for _, o := range n.Outputs {
			if o == "" {
				continue
			}
			if p, ok := producer[o]; ok {
				return nil, invalidf("node %q (%s): output %q is already defined by %s", nodeName(n, i), n.OpType, o, p)
			}
			producer[o] = fmt.Sprintf("node %q (%s)", nodeName(n, i), n.OpType)
		}
	}
	for i, n := range g.Nodes {
		for _, in := range n.Inputs {
			if in == "" {
				continue
			}
			if _, ok := producer[in]; !ok {
				return nil, invalidf("node %q (%s): input %q is undefined: expected a graph input, an initializer or a node output of that name",
					nodeName(n, i), n.OpType, in)
			}
		}
	}
	for i, v := range g.Outputs {
		if v == nil || v.Name == "" {
			return nil, invalidf("graph output #%d: expected a name, got none", i)
		}
		if _, ok := producer[v.Name]; !ok {
			return nil, invalidf("graph output %q is not produced by any node, input or initializer", v.Name)
		}
	}
	order, err := topoOrder(g)
	if err != nil {
		return nil, err
	}
	if u := Unsupported(m); len(u) > 0 {
		return nil, &UnsupportedError{Ops: u}
	}
	return order, nil
}

func describeOpsets(ops []OpsetImport) string {
	if len(ops) == 0 {
		return "none"
	}
	parts := make([]string, len(ops))
	for i, o := range ops {
		parts[i] = fmt.Sprintf("%q version %d", o.Domain, o.Version)
	}
	return strings.Join(parts, ", ")
}

// topoOrder returns the indices of g.Nodes in topological order, from a
// stable Kahn sort (Kahn 1962, "Topological sorting of large networks"):
// repeatedly take the first node in graph order all of whose inputs are
// available. Names must be checked first.
func topoOrder(g *Graph) ([]int, error) {
	n := len(g.Nodes)
	producedBy := map[string]int{}
	for i, nd := range g.Nodes {
		for _, o := range nd.Outputs {
			if o != "" {
				producedBy[o] = i
			}
		}
	}
	// deps[i] are the nodes i reads from; users[j] the nodes that read j.
	indeg := make([]int, n)
	users := make([][]int, n)
	for i, nd := range g.Nodes {
		seen := map[int]bool{}
		for _, in := range nd.Inputs {
			j, ok := producedBy[in]
			if !ok || in == "" || seen[j] {
				continue
			}
			seen[j] = true
			indeg[i]++
			users[j] = append(users[j], i)
		}
	}
	// ready is a min-heap of node indices, so among ready nodes the earliest
	// in graph order goes first.
	ready := &intHeap{}
	for i := 0; i < n; i++ {
		if indeg[i] == 0 {
			heap.Push(ready, i)
		}
	}
	order := make([]int, 0, n)
	done := make([]bool, n)
	for ready.Len() > 0 {
		i := heap.Pop(ready).(int)
		done[i] = true
		order = append(order, i)
		for _, u := range users[i] {
			indeg[u]--
			if indeg[u] == 0 {
				heap.Push(ready, u)
			}
		}
	}
	if len(order) < n {
		return nil, cycleError(g, done, producedBy)
	}
	return order, nil
}

// cycleError walks back from an unsorted node through unsorted producers
// until a node repeats, and names the nodes of that cycle in data-flow order.
func cycleError(g *Graph, done []bool, producedBy map[string]int) error {
	start := -1
	for i := range done {
		if !done[i] {
			start = i
			break
		}
	}
	pos := map[int]int{}
	var path []int
	cur := start
	for {
		if p, ok := pos[cur]; ok {
			path = path[p:]
			break
		}
		pos[cur] = len(path)
		path = append(path, cur)
		next := -1
		for _, in := range g.Nodes[cur].Inputs {
			if j, ok := producedBy[in]; ok && in != "" && !done[j] {
				next = j
				break
			}
		}
		if next < 0 { // cannot happen: an unsorted node has an unsorted producer
			break
		}
		cur = next
	}
	names := make([]string, len(path))
	for k := range path {
		// path runs against the data flow; reverse it.
		i := path[len(path)-1-k]
		names[k] = fmt.Sprintf("%q (%s)", nodeName(g.Nodes[i], i), g.Nodes[i].OpType)
	}
	return fmt.Errorf("%w: nodes %s depend on each other in a cycle: expected an acyclic graph (%w)",
		ErrInvalid, strings.Join(names, " -> "), ErrCycle)
}

type intHeap []int

func (h intHeap) Len() int           { return len(h) }
func (h intHeap) Less(i, j int) bool { return h[i] < h[j] }
func (h intHeap) Swap(i, j int)      { h[i], h[j] = h[j], h[i] }
func (h *intHeap) Push(x any)        { *h = append(*h, x.(int)) }
func (h *intHeap) Pop() any {
	old := *h
	x := old[len(old)-1]
	*h = old[:len(old)-1]
	return x
}

// usesDefaultDomain reports whether a node of g is in the default domain.
func usesDefaultDomain(g *Graph) bool {
	for _, n := range g.Nodes {
		if n != nil && isDefaultDomain(n.Domain) {
			return true
		}
	}
	return false
}
