package main

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"path/filepath"
	"runtime"
	"sync"
	"time"

	"github.com/apportion/apportion/bench"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/cpupeak"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// request is one line of the JSON protocol both sides speak (see
// bench/torch_side.py).
type request struct {
	Cmd     string `json:"cmd"`
	Model   string `json:"model,omitempty"`
	Task    string `json:"task,omitempty"`
	Iters   int    `json:"iters,omitempty"`
	Samples int    `json:"samples,omitempty"`
	N       int    `json:"n,omitempty"`
	// rows and forward (the forward-only table): a model file, a row
	// count and a batch size.
	Path  string `json:"path,omitempty"`
	Rows  int    `json:"rows,omitempty"`
	Batch int    `json:"batch,omitempty"`
}

// response is the union of the answers.
type response struct {
	Error string `json:"error,omitempty"`
	// info
	Go      string `json:"go,omitempty"`
	Torch   string `json:"torch,omitempty"`
	Threads int    `json:"threads,omitempty"`
	// check
	Out     []float64 `json:"out,omitempty"`
	Target  int       `json:"target"`
	Grad    []float64 `json:"grad,omitempty"`
	IG      []float64 `json:"ig,omitempty"`
	IGDelta float64   `json:"ig_delta"`
	// time
	Seconds float64 `json:"seconds"`
	Allocs  float64 `json:"allocs"` // per call
	Bytes   float64 `json:"bytes"`  // per call
	Rows    int     `json:"rows"`   // model rows per call (perturb)
	// peak: the FMA ceiling of GOMAXPROCS cores and nn's matrix-product rate
	GFLOPS float64 `json:"gflops,omitempty"`
	GEMM   float64 `json:"gemm,omitempty"`
}

// goSide serves the protocol on the Go side: it runs under the GOMAXPROCS
// its parent set.
type goSide struct {
	dir      string
	heads    map[string]*nn.Head
	warm     map[string]bool
	perturbs map[string]*perturbRun
}

func runChild(dir string, in io.Reader, out io.Writer) error {
	s := &goSide{dir: dir, heads: map[string]*nn.Head{}, warm: map[string]bool{}, perturbs: map[string]*perturbRun{}}
	sc := bufio.NewScanner(in)
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	enc := json.NewEncoder(out)
	for sc.Scan() {
		var req request
		var resp response
		if err := json.Unmarshal(sc.Bytes(), &req); err != nil {
			resp.Error = err.Error()
		} else if r, err := s.serve(req); err != nil {
			resp.Error = err.Error()
		} else {
			resp = r
		}
		if err := enc.Encode(resp); err != nil {
			return err
		}
	}
	return sc.Err()
}

func (s *goSide) head(name string) (*nn.Head, bench.Spec, error) {
	spec, err := bench.Lookup(name)
	if err != nil {
		return nil, spec, err
	}
	if h, ok := s.heads[name]; ok {
		return h, spec, nil
	}
	m, err := onnxlite.DecodeFile(filepath.Join(s.dir, name+".onnx"), onnxlite.DecodeOptions{})
	if err != nil {
		return nil, spec, err
	}
	// One call may split its batch over every thread the child is given,
	// as torch.set_num_threads lets one PyTorch call use them.
	nw, err := nn.Compile(m, nn.Options{Parallel: runtime.GOMAXPROCS(0)})
	if err != nil {
		return nil, spec, err
	}
	h, err := nw.Head(nn.Selection{})
	if err != nil {
		return nil, spec, err
	}
	s.heads[name] = h
	return h, spec, nil
}

func (s *goSide) serve(req request) (response, error) {
	ctx := context.Background()
	switch req.Cmd {
	case "info":
		return response{Go: runtime.Version(), Threads: runtime.GOMAXPROCS(0)}, nil
	case "peak":
		g, err := peakGFLOPS(500 * time.Millisecond)
		if err != nil {
			return response{}, err
		}
		return response{GFLOPS: fmaGFLOPS(500 * time.Millisecond), GEMM: g}, nil
	case "check":
		h, spec, err := s.head(req.Model)
		if err != nil {
			return response{}, err
		}
		n := max(req.N, 1)
		x := bench.Input(spec, n)
		out, err := h.Forward(ctx, x, n)
		if err != nil {
			return response{}, err
		}
		t := gradattr.Top(out[:h.OutputSize()])
		targets := make([]int, n)
		for i := range targets {
			targets[i] = t
		}
		_, g, err := h.Gradient(ctx, x, n, targets)
		if err != nil {
			return response{}, err
		}
		// The check integrates from x′ = 0.1·x rather than from 0: at α = 0
		// of the zero baseline every max-pooling window holds ties (a
		// constant image), where the gradient is not unique and the two
		// engines may route it to different positions.
		x1 := x[:len(x)/n]
		base := make([]float64, len(x1))
		for i, v := range x1 {
			base[i] = 0.1 * v
		}
		ig, err := gradattr.IntegratedGradients(ctx, h, x1, t, gradattr.IGOptions{Points: 64,
			Baselines: []gradattr.Baseline{{Kind: gradattr.BaselineValues, Values: base}}})
		if err != nil {
			return response{}, err
		}
		return response{Out: out, Target: t, Grad: g, IG: ig.Attributions, IGDelta: ig.Output - ig.BaselineOutput}, nil
	case "time":
		h, spec, err := s.head(req.Model)
		if err != nil {
			return response{}, err
		}
		call, err := goTask(ctx, h, spec, req.Task, req.Samples)
		if err != nil {
			return response{}, err
		}
		key := fmt.Sprintf("%s/%s/%d", req.Model, req.Task, req.Samples)
		if !s.warm[key] { // the first call compiles the programs
			if err := call(); err != nil {
				return response{}, err
			}
			s.warm[key] = true
		}
		return timeCalls(max(req.Iters, 1), call)
	case "perturb":
		return s.timePerturb(req.Task, max(req.Iters, 1))
	case "forward":
		return s.forwardRows(req.Task, max(req.N, 1))
	}
	return response{}, fmt.Errorf("unknown cmd %q", req.Cmd)
}

// timeCalls times iters calls of call, after a garbage collection, and
// returns the seconds and the allocations per call.
func timeCalls(iters int, call func() error) (response, error) {
	runtime.GC()
	var m0, m1 runtime.MemStats
	runtime.ReadMemStats(&m0)
	t0 := time.Now()
	for i := 0; i < iters; i++ {
		if err := call(); err != nil {
			return response{}, err
		}
	}
	sec := time.Since(t0).Seconds()
	runtime.ReadMemStats(&m1)
	return response{Seconds: sec,
		Allocs: float64(m1.Mallocs-m0.Mallocs) / float64(iters),
		Bytes:  float64(m1.TotalAlloc-m0.TotalAlloc) / float64(iters)}, nil
}

// goTask returns one call of task on h: the same work bench/torch_side.py
// times for the task of the same name.
func goTask(ctx context.Context, h *nn.Head, spec bench.Spec, task string, samples int) (func() error, error) {
	samples = max(samples, 1)
	x := bench.Input(spec, samples)
	size := len(x) / samples
	x1 := x[:size]
	out, err := h.Forward(ctx, x1, 1)
	if err != nil {
		return nil, err
	}
	t := gradattr.Top(out)
	ig := gradattr.IGOptions{Points: 64}
	switch task {
	case "predict":
		return func() error { _, err := h.Forward(ctx, x1, 1); return err }, nil
	case "gradient":
		return func() error { _, err := gradattr.Gradient(ctx, h, x1, t, gradattr.GradientOptions{}); return err }, nil
	case "ig64":
		return func() error { _, err := gradattr.IntegratedGradients(ctx, h, x1, t, ig); return err }, nil
	case "smoothgrad50":
		seed := uint64(0)
		return func() error {
			seed++
			_, err := gradattr.SmoothGrad(ctx, h, x1, t, gradattr.SmoothGradOptions{Samples: 50, Seed: seed})
			return err
		}, nil
	case "ig64x":
		return func() error {
			for i := 0; i < samples; i++ {
				if _, err := gradattr.IntegratedGradients(ctx, h, x[i*size:(i+1)*size], t, ig); err != nil {
					return err
				}
			}
			return nil
		}, nil
	}
	return nil, fmt.Errorf("unknown task %q", task)
}

// fmaGFLOPS is the float32 fused multiply-add ceiling of the cores this
// process may use: cpupeak's register-only loop run on GOMAXPROCS goroutines
// at once, their rates summed.
func fmaGFLOPS(d time.Duration) float64 {
	n := runtime.GOMAXPROCS(0)
	rates := make([]float64, n)
	var wg sync.WaitGroup
	for i := range rates {
		wg.Go(func() { rates[i] = cpupeak.GFLOPS(d) })
	}
	wg.Wait()
	total := 0.0
	for _, r := range rates {
		total += r
	}
	return total
}

// peakGFLOPS measures the float32 matrix-multiply rate nn gives a model on
// this machine: a one-node ONNX graph x·W (MatMul with a constant W) run
// with nn's Head.Forward, so the product goes through the same GEMM kernel,
// packing and dispatch as the zoo models' Gemm and Conv layers. Two shapes:
// a square 256×256×256 product (batch 256) and a convolution-like
// 64×1024×256 one (batch 64, long rows). It keeps the best of ten trials of
// d/10 each, so that a busy machine lowers it less; 2·m·n·k FLOPs per call.
// Forward also converts the batch from and to float64, about 1% of a call
// at these sizes, which the rate includes.
func peakGFLOPS(d time.Duration) (float64, error) {
	best := 0.0
	ctx := context.Background()
	for _, sh := range [][3]int{{256, 256, 256}, {64, 1024, 256}} {
		m, n, k := sh[0], sh[1], sh[2]
		nw, err := nn.Compile(peakModel(k, n), nn.Options{MaxBatch: m})
		if err != nil {
			return 0, fmt.Errorf("peak model %d×%d: %w", k, n, err)
		}
		h, err := nw.Head(nn.Selection{})
		if err != nil {
			return 0, fmt.Errorf("peak model %d×%d: %w", k, n, err)
		}
		x := make([]float64, m*k)
		for i := range x {
			x[i] = float64(i%7) * 0.25
		}
		if _, err := h.Forward(ctx, x, m); err != nil { // compile and warm up
			return 0, fmt.Errorf("peak model %d×%d: %w", k, n, err)
		}
		for trial := 0; trial < 10; trial++ {
			calls := 0
			start := time.Now()
			for time.Since(start) < d/10 {
				if _, err := h.Forward(ctx, x, m); err != nil {
					return 0, err
				}
				calls++
			}
			best = max(best, float64(calls)*2*float64(m*n*k)/time.Since(start).Seconds()/1e9)
		}
	}
	return best, nil
}

// peakModel is the graph y = x·W with x of shape [N, k] and a constant W of
// shape [k, n].
func peakModel(k, n int) *onnxlite.Model {
	w := make([]float32, k*n)
	for i := range w {
		w[i] = float32(i%5) * 0.5
	}
	tensorType := func(dims ...onnxlite.Dim) *onnxlite.Type {
		return &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Float, HasShape: true, Shape: dims}
	}
	batch := onnxlite.Dim{Param: "N"}
	fixed := func(v int) onnxlite.Dim { return onnxlite.Dim{Value: int64(v), HasValue: true} }
	return &onnxlite.Model{
		IRVersion: 8,
		Opsets:    []onnxlite.OpsetImport{{Version: 13}},
		Graph: &onnxlite.Graph{
			Name:         "peak",
			Inputs:       []*onnxlite.ValueInfo{{Name: "x", Type: tensorType(batch, fixed(k))}},
			Outputs:      []*onnxlite.ValueInfo{{Name: "y", Type: tensorType(batch, fixed(n))}},
			Initializers: []*onnxlite.Tensor{{Name: "w", DType: onnxlite.Float, Dims: []int64{int64(k), int64(n)}, Data: w}},
			Nodes:        []*onnxlite.Node{{Name: "matmul", OpType: "MatMul", Inputs: []string{"x", "w"}, Outputs: []string{"y"}}},
		},
	}
}
