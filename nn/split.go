package nn

import (
	"context"
	"fmt"
	"sync"

	"github.com/apportion/apportion/onnxlite"
)

// Splitting a call's batch across goroutines (Options.Parallel).
//
// A sample's results do not depend on the other samples of its batch nor on
// the batch size (every kernel computes a sample from that sample's values
// alone, in the same order), so the parts of a split batch, run on programs
// compiled for the part sizes, give the bits the whole batch gives.

// splitMinPartFLOPs is the least forward-pass work, in floating-point
// operations, that a part of a split call must carry (2 per multiply-add of
// Conv, Gemm and MatMul, the count bench/compare uses): below it a
// goroutine hand-off costs more than the part gains. DEVELOPERS.md gives
// the measurements behind the value (BenchmarkSplitGradient).
const splitMinPartFLOPs = 8_000_000

// splitParts returns an upper bound on the number of parts a batch of n
// samples may be run in; runSplit refines it by the work per sample.
func (nw *Network) splitParts(n int) int {
	if nw.opts.Parallel <= 1 || n < 2 {
		return 1
	}
	return min(nw.opts.Parallel, n)
}

// staticFLOPs counts 2 FLOPs per multiply-add of the Conv, Gemm and MatMul
// nodes of st: the forward work of one pass.
func staticFLOPs(st *onnxlite.Static) float64 {
	total := 0.0
	for _, n := range st.Nodes {
		if len(n.Outputs) == 0 || len(n.Inputs) < 2 {
			continue
		}
		y, ok := st.Values[n.Outputs[0]]
		if !ok {
			continue
		}
		outs := float64(prod(y.Shape))
		switch n.OpType {
		case "Gemm", "MatMul":
			a := st.Values[n.Inputs[0]].Shape
			if len(a) == 0 {
				continue
			}
			k := a[len(a)-1]
			if n.OpType == "Gemm" && n.AttrInt("transA", 0) != 0 {
				k = a[0]
			}
			total += 2 * float64(k) * outs
		case "Conv":
			w := st.Values[n.Inputs[1]].Shape // (M, C/group, kH, kW)
			if len(w) < 1 {
				continue
			}
			total += 2 * float64(prod(w[1:])) * outs
		}
	}
	return total
}

// flopsPerSample returns the forward work of one sample of p.
func (p *program) flopsPerSample() float64 {
	if p.perSample {
		return p.inner.flopsPerSample()
	}
	if p.static == nil || len(p.inShapes) == 0 || len(p.inShapes[0]) == 0 || p.inShapes[0][0] <= 0 {
		return 0
	}
	return staticFLOPs(p.static) / float64(p.inShapes[0][0])
}

// splitBounds returns the first sample of part k of a batch of n cut into
// parts near-equal parts: the first n mod parts parts hold one sample more.
func splitBounds(n, parts, k int) int {
	q, r := n/parts, n%parts
	return k*q + min(k, r)
}

// splitPlan returns the number of parts to run a batch of n samples in, at
// most limit: 1 when a part would carry less than nw.splitMinFLOPs of work,
// when the model cannot run at the part size, or when the outputs of a
// part's program are not batched along their first dimension (so parts
// could not be concatenated). It sizes the work on the program of the
// largest part of a limit-way split, compiling it if needed (its machines
// are built only when it runs).
func (nw *Network) splitPlan(shapes [][]int, n, limit int, req request) int {
	m := splitBounds(n, limit, 1)
	cs := splitShapes(shapes, min(m, nw.opts.MaxBatch))
	p, err := nw.program(cs, req)
	if err != nil {
		// The part size is not runnable (a model fixing its batch, say):
		// the whole batch runs unsplit and reports its own errors.
		return 1
	}
	for _, s := range p.outputShapes() {
		if len(s) == 0 || s[0] != cs[0][0] {
			return 1
		}
	}
	parts := limit
	if nw.splitMinFLOPs > 0 {
		per := p.flopsPerSample()
		parts = min(parts, int(per*float64(n)/nw.splitMinFLOPs))
	}
	return max(parts, 1)
}

func splitShapes(shapes [][]int, m int) [][]int {
	cs := make([][]int, len(shapes))
	for i, s := range shapes {
		cs[i] = append([]int{m}, s[1:]...)
	}
	return cs
}

// splitPart is one part of a split call: its inputs and what it returns.
type splitPart struct {
	n      int
	shapes [][]int
	data   [][]float64
	mask   []float64

	outs      [][]float64
	outShapes [][]int
	grad      []float64
	err       error
}

// runSplit runs a batch of n samples as up to parts near-equal contiguous
// parts (see splitPlan), part 0 on the caller's goroutine and the others on
// their own, and concatenates their outputs and gradients in sample order.
// The first part to fail cancels the others; runSplit returns only after
// every part has returned.
func (nw *Network) runSplit(ctx context.Context, shapes [][]int, data [][]float64, req request, mask []float64, n, parts int) ([][]float64, [][]int, []float64, error) {
	parts = nw.splitPlan(shapes, n, parts, req)
	if parts <= 1 {
		return nw.runReqSeq(ctx, shapes, data, req, mask, n)
	}
	// The parts are cut here, so that the goroutines below reach only
	// their own slices and the caller's argument slices stay off the heap.
	res := make([]splitPart, parts)
	maskPer := 0
	if mask != nil {
		maskPer = len(mask) / n
	}
	for k := range res {
		start, end := splitBounds(n, parts, k), splitBounds(n, parts, k+1)
		r := &res[k]
		r.n = end - start
		r.shapes = splitShapes(shapes, r.n)
		r.data = make([][]float64, len(data))
		for i, s := range shapes {
			per := prod(s[1:])
			r.data[i] = data[i][start*per : end*per]
		}
		if mask != nil {
			r.mask = mask[start*maskPer : end*maskPer]
		}
	}
	return nw.runParts(ctx, req, res, n)
}

func (nw *Network) runParts(ctx context.Context, req request, res []splitPart, n int) ([][]float64, [][]int, []float64, error) {
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	var (
		mu       sync.Mutex
		firstErr error
	)
	runPart := func(k int) {
		r := &res[k]
		defer func() {
			if r.err != nil {
				mu.Lock()
				if firstErr == nil {
					firstErr = r.err
				}
				mu.Unlock()
				cancel()
			}
		}()
		// A part on its own goroutine is an edge of the package: a panic
		// there would end the process, so it is recovered there too.
		defer recoverEngine("part of a split call", &r.err)
		r.outs, r.outShapes, r.grad, r.err = nw.runReqSeq(ctx, r.shapes, r.data, req, r.mask, r.n)
	}
	var wg sync.WaitGroup
	wg.Add(len(res) - 1)
	for k := 1; k < len(res); k++ {
		go func() {
			defer wg.Done()
			runPart(k)
		}()
	}
	runPart(0)
	wg.Wait()
	if firstErr != nil {
		return nil, nil, nil, firstErr
	}
	return splitJoin(res, n)
}

// splitJoin concatenates the parts' results in order.
func splitJoin(res []splitPart, n int) ([][]float64, [][]int, []float64, error) {
	first := res[0]
	outs := make([][]float64, len(first.outs))
	outShapes := make([][]int, len(first.outShapes))
	for i, s := range first.outShapes {
		if len(s) == 0 {
			return nil, nil, nil, fmt.Errorf("%w: output %d has no batch dimension", ErrShape, i)
		}
		outShapes[i] = append([]int{n}, s[1:]...)
		size := 0
		for _, r := range res {
			size += len(r.outs[i])
		}
		outs[i] = make([]float64, 0, size)
		for _, r := range res {
			outs[i] = append(outs[i], r.outs[i]...)
		}
	}
	var grad []float64
	if first.grad != nil {
		size := 0
		for _, r := range res {
			size += len(r.grad)
		}
		grad = make([]float64, 0, size)
		for _, r := range res {
			grad = append(grad, r.grad...)
		}
	}
	return outs, outShapes, grad, nil
}
