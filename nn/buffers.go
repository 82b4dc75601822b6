package nn

import (
	"github.com/apportion/apportion/nn/internal/ops"

	"fmt"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// Output buffers kept across runs.
//
// Every op of nn/internal/ops writes its whole output into the buffer it
// is given when ops decides it may (the buffer contract in the ops package
// doc), and never keeps it. A machine therefore gives each such step a
// tensor that lives as long as the machine, and a pass allocates (almost)
// nothing.
//
// Steps share backing arrays by liveness. A step's buffer is busy from the
// step that writes it to the last step that reads it, directly or through a
// value that may alias it: an op of another package (gorgonia's reshape, for
// one, returns a shallow clone of its input) or one that gets no buffer is
// assumed to return a view of any of its inputs. Values the machine returns
// (outputs and the gradient) stay busy to the end of the pass; they are
// copied out before the next pass starts. A free array is reused by a later
// step when it is large enough (the smallest one that fits), or grown to fit
// (the largest free one); all sizes are known when the machine is built, so
// arrays are allocated once, at their final size. An elementwise step that
// is the last reader of an operand of its own shape writes over that
// operand's array (ops.InPlace names the operand): the one exception to
// "an op never writes an input", which ops allows for exactly such operands.

// assignBuffers assigns the kept buffers of m's plan: m.pre[i] is the
// preallocated output of step i (nil when the step gets none) and m.kept the
// number of bytes of all backing arrays. keep lists the nodes whose values
// are read after the pass.
func (m *machine) assignBuffers(keep G.Nodes) error {
	n := len(m.plan)
	m.pre = make([]G.Value, n)
	m.pd = make([]G.UsePreallocDoer, n)
	size := make([]int, n) // elements of step i's buffer; 0 for none
	for i, st := range m.plan {
		if st.op == nil {
			continue
		}
		pd, ok := ops.Buffered(st.op)
		if !ok {
			continue
		}
		shape := st.node.Shape()
		if len(shape) == 0 || shape.TotalSize() == 0 || !nodeDtype(st.node, m.dt) {
			continue
		}
		m.pd[i] = pd
		size[i] = shape.TotalSize()
	}
	// last[i]: the last step that reads value i, directly or through a
	// value that may alias it (n for the values read after the pass).
	last := make([]int, n)
	for k, st := range m.plan {
		last[k] = max(last[k], k)
		for _, j := range st.args {
			last[j] = max(last[j], k)
		}
	}
	for _, kn := range keep {
		if i, ok := m.slot[kn]; ok {
			last[i] = n
		}
	}
	for i := n - 1; i >= 0; i-- { // every reader of i comes after i
		if st := m.plan[i]; size[i] == 0 && st.op != nil {
			for _, j := range st.args {
				last[j] = max(last[j], last[i])
			}
		}
	}
	// Interval assignment in plan order.
	type array struct{ size, freeAfter int }
	var arrays []array
	which := make([]int, n)
	for i := range m.plan {
		if size[i] == 0 {
			continue
		}
		if k := ops.InPlace(m.plan[i].op); k >= 0 && k < len(m.plan[i].args) {
			// Write over operand k when this step is its last reader.
			if j := m.plan[i].args[k]; size[j] == size[i] && last[j] == i {
				which[i] = which[j]
				arrays[which[i]].freeAfter = last[i]
				continue
			}
		}
		best, grow := -1, -1
		for a, ar := range arrays {
			if ar.freeAfter >= i {
				continue
			}
			if ar.size >= size[i] && (best < 0 || ar.size < arrays[best].size) {
				best = a
			}
			if grow < 0 || ar.size > arrays[grow].size {
				grow = a
			}
		}
		switch {
		case best >= 0:
		case grow >= 0:
			best = grow
			arrays[best].size = size[i]
		default:
			best = len(arrays)
			arrays = append(arrays, array{size: size[i]})
		}
		arrays[best].freeAfter = last[i]
		which[i] = best
	}
	backs := make([]any, len(arrays))
	m.kept = 0
	for a, ar := range arrays {
		switch m.dt {
		case tensor.Float32:
			backs[a] = make([]float32, ar.size)
			m.kept += 4 * ar.size
		case tensor.Float64:
			backs[a] = make([]float64, ar.size)
			m.kept += 8 * ar.size
		default:
			return fmt.Errorf("%w: buffers of element type %v", ErrEngine, m.dt)
		}
	}
	for i, st := range m.plan {
		if size[i] == 0 {
			continue
		}
		var back any
		switch b := backs[which[i]].(type) {
		case []float32:
			back = b[:size[i]:size[i]]
		case []float64:
			back = b[:size[i]:size[i]]
		}
		m.pre[i] = tensor.New(tensor.WithShape(st.node.Shape().Clone()...), tensor.WithBacking(back))
	}
	return nil
}

// nodeDtype reports whether node n holds values of element type dt.
func nodeDtype(n *G.Node, dt tensor.Dtype) bool {
	d, ok := ops.ElemType(n)
	return ok && d == dt
}
