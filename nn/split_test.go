package nn

import (
	"context"
	"errors"
	"fmt"
	"math"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

// splitBits returns the IEEE 754 bit patterns of v: equal bits, not merely
// equal values (−0 and +0 differ, NaNs compare).
func splitBits(v []float64) []uint64 {
	b := make([]uint64, len(v))
	for i, x := range v {
		b[i] = math.Float64bits(x)
	}
	return b
}

// splitMachines returns, per batch size, the number of machines built for
// the programs of nw (per-sample programs count their inner program).
func splitMachines(nw *Network) map[int]int {
	nw.mu.Lock()
	defer nw.mu.Unlock()
	out := map[int]int{}
	for key, p := range nw.progs {
		b, err := strconv.Atoi(strings.Fields(strings.TrimPrefix(key, "["))[0])
		if err != nil || p.pool == nil {
			continue
		}
		out[b] += len(p.pool.slots)
	}
	return out
}

func splitTargets(h *Head, n int) []int {
	t := make([]int, n)
	for i := range t {
		t[i] = (3 * i) % h.OutputSize()
	}
	return t
}

// TestSplitBitIdentical checks that splitting a batch across 2 and 3
// goroutines returns the bits of the unsplit call, for forward passes
// (Head.Forward and Network.Forward) and gradients of the bench models. The
// reference is the Parallel 1 result, which reference_test.go checks against
// PyTorch autograd and gradcheck_test.go against central finite
// differences; a sample's results not depending on its batch is the
// invariant TestChunkingDoesNotChangeResults checks.
func TestSplitBitIdentical(t *testing.T) {
	ctx := context.Background()
	batches := []int{1, 2, 7, 64}
	for _, name := range splitModels {
		for _, dt := range []DType{Float32, Float64} {
			ref := splitHead(t, name, Options{DType: dt, Parallel: 1})
			for _, n := range batches {
				if raceEnabled && n == 64 && strings.HasPrefix(name, "cnn") {
					continue // minutes under the race detector; covered without it
				}
				x := splitInput(ref, n)
				target := splitTargets(ref, n)
				wantOut, err := ref.Forward(ctx, x, n)
				require.NoError(t, err)
				wantGOut, wantGrad, err := ref.Gradient(ctx, x, n, target)
				require.NoError(t, err)
				in := &onnxlite.Tensor{Name: ref.nw.inputs[0].Name, DType: onnxlite.Double, Dims: []int64{int64(n)}, Data: x}
				for _, d := range ref.InputShape() {
					in.Dims = append(in.Dims, int64(d))
				}
				wantNet, err := ref.nw.Forward(ctx, []*onnxlite.Tensor{in})
				require.NoError(t, err)
				for _, par := range []int{2, 3} {
					t.Run(fmt.Sprintf("%s/%s/n%d/p%d", name, dt, n, par), func(t *testing.T) {
						h := splitHead(t, name, Options{DType: dt, Parallel: par})
						h.nw.splitMinFLOPs = 0 // split every batch of 2 or more
						out, err := h.Forward(ctx, x, n)
						require.NoError(t, err)
						assert.Equal(t, splitBits(wantOut), splitBits(out), "forward")
						gout, grad, err := h.Gradient(ctx, x, n, target)
						require.NoError(t, err)
						assert.Equal(t, splitBits(wantGOut), splitBits(gout), "gradient outputs")
						assert.Equal(t, splitBits(wantGrad), splitBits(grad), "gradient")
						net, err := h.nw.Forward(ctx, []*onnxlite.Tensor{in})
						require.NoError(t, err)
						require.Len(t, net, len(wantNet))
						for i := range net {
							assert.Equal(t, wantNet[i].Dims, net[i].Dims)
							a, err := wantNet[i].Float64s()
							require.NoError(t, err)
							b, err := net[i].Float64s()
							require.NoError(t, err)
							assert.Equal(t, splitBits(a), splitBits(b), "network forward %d", i)
						}
						// The batch ran in parts: machines exist only for
						// the part sizes ⌈n/k⌉ and ⌊n/k⌋, k = min(par, n).
						k := min(par, n)
						built := splitMachines(h.nw)
						if n > 1 {
							assert.Zero(t, built[n], "no machine of the batch-%d program", n)
							assert.Positive(t, built[(n+k-1)/k], "machines of the part program")
						}
						for b := range built {
							assert.Contains(t, []int{n / k, (n + k - 1) / k}, b, "machine of batch %d", b)
						}
					})
				}
			}
		}
	}
}

// TestSplitWork checks the work estimate against the closed form of the
// bench models' layer sizes (bench/zoo.go: mlp-s is Gemm 30→64, 64→64,
// 64→2; 2 FLOPs per multiply-add, the count of bench.FLOPs) and that the
// default threshold keeps small passes on one goroutine and splits large
// ones.
func TestSplitWork(t *testing.T) {
	ctx := context.Background()
	h := splitHead(t, "mlp-s", Options{Parallel: 2})
	n := 64
	_, _, err := h.Gradient(ctx, splitInput(h, n), n, splitTargets(h, n))
	require.NoError(t, err)
	shapes, _ := h.feed(nil, 32)
	p, err := h.nw.program(shapes, request{outputs: h.outputs, grad: true})
	require.NoError(t, err)
	// closed form: 2·(30·64 + 64·64 + 64·2) = 12288 FLOPs per sample.
	assert.Equal(t, 12288.0, p.flopsPerSample())
	// 64·12288 FLOPs < 2·splitMinPartFLOPs: one part, on the batch-64 program.
	assert.Positive(t, splitMachines(h.nw)[64])
	assert.Zero(t, splitMachines(h.nw)[32])

	c := splitHead(t, "cnn-m", Options{Parallel: 2})
	_, _, err = c.Gradient(ctx, splitInput(c, 2), 2, splitTargets(c, 2))
	require.NoError(t, err)
	shapes1, _ := c.feed(nil, 1)
	q, err := c.nw.program(shapes1, request{outputs: c.outputs, grad: true})
	require.NoError(t, err)
	// cnn-m carries more than splitMinPartFLOPs per sample (12 722 176 by
	// bench.FLOPs, the count bench/compare reports): a batch of 2 runs as
	// two parts of 1.
	require.Greater(t, q.flopsPerSample(), float64(splitMinPartFLOPs))
	assert.Zero(t, splitMachines(c.nw)[2])
	assert.Positive(t, splitMachines(c.nw)[1])
}

// TestSplitConcurrentCallers runs split calls from several goroutines at
// once (run with -race); each must get the unsplit call's bits (the
// reference of TestSplitBitIdentical).
func TestSplitConcurrentCallers(t *testing.T) {
	ctx := context.Background()
	ref := splitHead(t, "cnn-s", Options{})
	h := splitHead(t, "cnn-s", Options{Parallel: 2})
	h.nw.splitMinFLOPs = 0
	const callers, calls = 4, 3
	type job struct {
		x      []float64
		n      int
		target []int
		want   []uint64
	}
	jobs := make([]job, callers)
	for i := range jobs {
		n := 3 + 2*i
		x := splitInput(ref, n)
		target := splitTargets(ref, n)
		_, g, err := ref.Gradient(ctx, x, n, target)
		require.NoError(t, err)
		jobs[i] = job{x, n, target, splitBits(g)}
	}
	var wg sync.WaitGroup
	errs := make([]error, callers)
	for i := range jobs {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for range calls {
				_, g, err := h.Gradient(ctx, jobs[i].x, jobs[i].n, jobs[i].target)
				if err == nil && !assert.Equal(t, jobs[i].want, splitBits(g)) {
					err = errors.New("bits differ")
				}
				if err != nil {
					errs[i] = err
					return
				}
			}
		}()
	}
	wg.Wait()
	for i, err := range errs {
		assert.NoError(t, err, "caller %d", i)
	}
}

// TestSplitCancel cancels a split call while its parts run: the call
// returns the context's error and leaves no goroutine behind (common
// practice for context-aware Go APIs).
func TestSplitCancel(t *testing.T) {
	h := splitHead(t, "cnn-m", Options{Parallel: 2, MaxBatch: 2})
	n := 256 // 64 chunks per part, several milliseconds each
	x := splitInput(h, n)
	target := splitTargets(h, n)
	before := runtime.NumGoroutine()
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() {
		_, _, err := h.Gradient(ctx, x, n, target)
		done <- err
	}()
	// Cancel once both parts have built a machine of the chunk program.
	require.Eventually(t, func() bool { return splitMachines(h.nw)[2] >= 2 }, 30*time.Second, time.Millisecond)
	cancel()
	select {
	case err := <-done:
		require.ErrorIs(t, err, context.Canceled)
	case <-time.After(30 * time.Second):
		t.Fatal("the cancelled call did not return")
	}
	// testify's Eventually polls on a goroutine of its own: poll here.
	for deadline := time.Now().Add(5 * time.Second); runtime.NumGoroutine() > before && time.Now().Before(deadline); {
		time.Sleep(time.Millisecond)
	}
	if !assert.LessOrEqual(t, runtime.NumGoroutine(), before, "goroutines left behind") {
		buf := make([]byte, 1<<16)
		t.Logf("%s", buf[:runtime.Stack(buf, true)])
	}

	// A context cancelled before the call: the same error, nothing run.
	_, _, err := h.Gradient(ctx, x[:4*len(x)/n], 4, target[:4])
	assert.ErrorIs(t, err, context.Canceled)
}

// TestSplitBadInput checks that Parallel changes none of the input errors
// (the same cases as TestBadInput), including an oversized request.
func TestSplitBadInput(t *testing.T) {
	ctx := context.Background()
	_, err := Compile(mlpModel(3, 4, 2, 17), Options{Parallel: -1})
	require.ErrorIs(t, err, ErrBadRequest)
	assert.Contains(t, err.Error(), "Parallel -1")

	h := splitHead(t, "mlp-s", Options{Parallel: 2})
	h.nw.splitMinFLOPs = 0
	x := splitInput(h, 4)
	_, err = h.Forward(ctx, x, math.MaxInt64/2) // oversized request
	require.ErrorIs(t, err, ErrShape)
	assert.Contains(t, err.Error(), "need")
	_, _, err = h.Gradient(ctx, x, 5, splitTargets(h, 5))
	assert.ErrorIs(t, err, ErrShape)
	x[37] = math.NaN()
	_, err = h.Forward(ctx, x, 4)
	assert.ErrorIs(t, err, ErrNonFinite)
	x[37] = 0
	_, _, err = h.Gradient(ctx, x, 4, []int{0, 0, 0, 2})
	require.ErrorIs(t, err, ErrBadRequest)
	assert.Contains(t, err.Error(), "target[3] = 2")
}

// TestSplitFixedBatch runs a model that fixes its batch to 4 (so no part
// size can run) with Parallel 2: the call runs unsplit and gives Relu's
// closed form max(x, 0) (ONNX Relu spec), and another batch size still gets
// the fixed-batch error.
func TestSplitFixedBatch(t *testing.T) {
	ctx := context.Background()
	g := newIR(13, 1)
	g.input("x", 4, 3)
	g.node("Relu", []string{"x"}, "y")
	g.output("y")
	nw, err := Compile(g.m, Options{Parallel: 2})
	require.NoError(t, err)
	nw.splitMinFLOPs = 0
	x := []float64{-1, 2, -3, 4, -5, 6, 0.5, -0.25, 7, -8, 9, -0.125}
	outs, err := nw.Forward(ctx, []*onnxlite.Tensor{tensor64("x", []int64{4, 3}, x)})
	require.NoError(t, err)
	got, err := outs[0].Float64s()
	require.NoError(t, err)
	for i, v := range x {
		assert.Equal(t, math.Max(v, 0), got[i], "y[%d]", i) // closed form: Relu(x) = max(x, 0)
	}
	_, err = nw.Forward(ctx, []*onnxlite.Tensor{tensor64("x", []int64{2, 3}, x[:6])})
	require.ErrorIs(t, err, ErrShape)
	assert.Contains(t, err.Error(), "fixes the batch dimension to 4")
}
