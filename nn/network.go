// Package nn compiles ONNX graphs decoded by onnxlite into gorgonia programs
// and runs them: batched forward passes and gradients of one selected output
// element with respect to one input, for every sample of a batch in one
// forward and one backward pass. Every subgraph whose inputs are all
// constants is evaluated once, when a program is compiled, with the same
// operators the program runs.
//
// A Network compiles lazily: one program per set of input shapes (and, for
// gradients, per selected output), each run on a bounded pool of compiled
// gorgonia graphs, so one Network can be shared by many goroutines; with
// Options.Parallel one call may also split a large batch across goroutines,
// with the same results bit for bit. The first input dimension is the batch;
// models exported with a fixed batch of one are run at any batch size when
// their graph allows it, and sample by sample otherwise.
package nn

import (
	"github.com/apportion/apportion/nn/internal/ops"

	"context"
	"errors"
	"fmt"
	"math"
	"runtime"
	"sync"

	"github.com/apportion/apportion/onnxlite"
)

// DType is the element type a Network computes in.
type DType int

// The engine element types. Float32 is the zero value and the default.
const (
	Float32 DType = iota
	Float64
)

// String returns "float32" or "float64".
func (d DType) String() string {
	switch d {
	case Float32:
		return "float32"
	case Float64:
		return "float64"
	}
	return fmt.Sprintf("DType(%d)", int(d))
}

// DefaultMaxBatch is the largest batch run as one program when
// Options.MaxBatch is zero.
const DefaultMaxBatch = 64

// Options configures Compile. The zero value means: float32 arithmetic,
// declared input shapes, batches of at most DefaultMaxBatch samples per
// program run, each call run on its caller's goroutine, and the larger of
// runtime.GOMAXPROCS(0) and Parallel machines per program.
type Options struct {
	// DType is the element type of the computation (default Float32).
	DType DType
	// InputShapes gives per-sample shapes (without the batch dimension) for
	// inputs whose non-batch dimensions are symbolic or unknown in the model.
	InputShapes map[string][]int
	// MaxBatch is the largest batch run as one program; larger requests
	// are split into chunks of at most MaxBatch samples. Left at zero, it
	// is DefaultMaxBatch, and a request of more than twice that runs in
	// larger chunks (up to 1024 samples) where the values of a chunk stay
	// small, 4 MiB: the small dense models, whose runs of 64 samples
	// spend much of their time outside the products. A sample's results
	// are the same bits whatever its chunk.
	MaxBatch int
	// Machines is the number of compiled machines per program, that is the
	// number of concurrent runs of one program (default the larger of
	// runtime.GOMAXPROCS(0) and Parallel). A machine is built on first use
	// and kept; besides its graph it keeps its input tensors and its steps'
	// output buffers between runs, steps whose values are not live at the
	// same time sharing one array: about one pass's live activations. A
	// Network keeps up to Machines machines for each program it has run (one
	// per input shape and, for gradients, per selected output).
	Machines int
	// Parallel is the number of goroutines one call (Forward, Head.Forward,
	// Head.Gradient) may split its batch across (default 1: the whole batch
	// runs on the caller's goroutine, which suits a server whose
	// concurrency comes from its requests). With Parallel p > 1 a batch of
	// n samples is cut into at most p contiguous parts of near-equal size,
	// each carrying at least 8·10⁶ FLOPs of forward work (2 per multiply-add
	// of Conv, Gemm and MatMul), so a small pass stays whole; the parts run
	// concurrently on the programs of their sizes, taking machines from the
	// same pools as other callers, and their results are put back in sample
	// order, bit for bit those of Parallel 1: a sample's results do not
	// depend on its batch.
	Parallel int
	// MaxValueBytes bounds the bytes of the values of one program: of
	// every value of the graph at the program's input shape, constants
	// included, as the engine holds them, and of their gradients in a
	// gradient program (default DefaultMaxValueBytes). It is checked from
	// the inferred shapes before a program is built, and before shape
	// inference makes a folded constant; a program over it is an error
	// wrapping ErrTooLarge.
	MaxValueBytes int64
}

// DefaultMaxValueBytes is Options.MaxValueBytes when it is zero: 256 MiB
// (DEVELOPERS.md compares it with the programs of the bench models).
const DefaultMaxValueBytes = 256 << 20

// Sentinel errors. Errors returned by this package that stem from one of these
// conditions wrap the matching sentinel, so callers can test with errors.Is.
var (
	// ErrShape marks an input whose shape or length is not the expected one,
	// and operands of an operator that do not fit it or each other.
	ErrShape = ops.ErrShape
	// ErrNonFinite marks an input holding NaN or ±Inf where finite values are required.
	ErrNonFinite = errors.New("non-finite input")
	// ErrBadRequest marks an argument outside its valid range: a batch size,
	// a target index, an unknown output name.
	ErrBadRequest = errors.New("bad request")
	// ErrEngine marks a failure inside the gorgonia engine (including a
	// recovered panic) while building or running a program.
	ErrEngine = errors.New("engine failure")
)

// Port describes one runtime input or output of a Network.
type Port struct {
	// Name is the ONNX value name.
	Name string
	// Shape is the shape of one sample, without the batch dimension; -1
	// marks a dimension that is not known until run time. For a
	// compile-time input it is the whole declared shape.
	Shape []int
	// DType is the ONNX element type declared by the model.
	DType onnxlite.DataType
	// CompileTime marks an input whose values the model uses only as
	// parameters (a target shape, axes, slice bounds, pads, scales; see
	// onnxlite.InputUses): it has no batch dimension, and the Network
	// compiles a program for each value it is given, cached by value.
	CompileTime bool
}

// Network is a compiled ONNX model. It is safe for concurrent use.
type Network struct {
	model   *onnxlite.Model
	relaxed *onnxlite.Model // Reshape shapes with a leading 1 rewritten to 0
	opts    Options
	inputs  []Port       // every runtime input, in graph order
	feeds   []Port       // the inputs computed with at run time, in graph order
	held    []Port       // the compile-time inputs, in graph order
	unread  map[int]bool // the inputs no node reads, by index in inputs
	outputs []Port
	// declared holds the full declared shape of each input of feeds (-1
	// for symbolic dims).
	declared [][]int

	// splitMinFLOPs is the least forward work per part of a split call
	// (splitMinPartFLOPs; tests lower it to split every batch).
	splitMinFLOPs float64
	// growChunks says Options.MaxBatch was left at zero, so that larger
	// batches may run in grown chunks (grownChunk) whose varying values
	// take at most grownBytes (grownBatchBytes; tests lower it).
	growChunks bool
	grownBytes int64

	mu    sync.Mutex
	progs map[string]*program
	// heldProgs counts the programs compiled for held values (see
	// maxHeldPrograms).
	heldProgs int
	// outTypes are the element types of the graph outputs, known once a
	// program of them is compiled.
	outTypes []onnxlite.DataType
	layers   map[string]*Layer // by value and selection
}

// Compile validates m and prepares it for running. Programs are compiled
// lazily on first use for each set of input shapes. The nodes whose operator
// the package does not run (see Unsupported) are reported together in one
// *onnxlite.UnsupportedError, which wraps onnxlite.ErrUnsupported.
func Compile(m *onnxlite.Model, opts Options) (nw *Network, err error) {
	defer recoverEngine("nn: compile", &err)
	if m == nil || m.Graph == nil {
		return nil, fmt.Errorf("nn: compile: %w: nil model or graph", ErrBadRequest)
	}
	if opts.DType != Float32 && opts.DType != Float64 {
		return nil, fmt.Errorf("nn: compile: %w: unknown DType %d (want Float32 or Float64)", ErrBadRequest, int(opts.DType))
	}
	if opts.MaxBatch < 0 || opts.Machines < 0 || opts.Parallel < 0 || opts.MaxValueBytes < 0 {
		return nil, fmt.Errorf("nn: compile: %w: negative MaxBatch %d, Machines %d, Parallel %d or MaxValueBytes %d", ErrBadRequest, opts.MaxBatch, opts.Machines, opts.Parallel, opts.MaxValueBytes)
	}
	if opts.MaxValueBytes == 0 {
		opts.MaxValueBytes = DefaultMaxValueBytes
	}
	grow := opts.MaxBatch == 0
	if grow {
		opts.MaxBatch = DefaultMaxBatch
	}
	if opts.Parallel == 0 {
		opts.Parallel = 1
	}
	if opts.Machines == 0 {
		opts.Machines = max(runtime.GOMAXPROCS(0), opts.Parallel)
	}
	// onnxlite's verdict on the operators gives way to nn's, which lists
	// every node nn does not run (those onnxlite does not support among them).
	var ue *onnxlite.UnsupportedError
	if err := m.Validate(); err != nil && !errors.As(err, &ue) {
		return nil, modelError("nn: compile", err)
	}
	if u := Unsupported(m); len(u) > 0 {
		return nil, &onnxlite.UnsupportedError{Ops: u}
	}
	nw = &Network{model: m, opts: opts, progs: map[string]*program{},
		splitMinFLOPs: splitMinPartFLOPs, growChunks: grow, grownBytes: grownBatchBytes}
	nw.relaxed = relaxModel(m)
	if err := nw.describe(); err != nil {
		return nil, modelError("nn: compile", err)
	}
	return nw, nil
}

// Inputs returns the runtime inputs (graph inputs not backed by an
// initializer) in graph order: the order Forward binds its arguments in.
func (nw *Network) Inputs() []Port { return clonePorts(nw.inputs) }

// Outputs returns the graph outputs in graph order.
func (nw *Network) Outputs() []Port { return clonePorts(nw.outputs) }

// DType returns the element type the Network computes in.
func (nw *Network) DType() DType { return nw.opts.DType }

func clonePorts(ps []Port) []Port {
	out := make([]Port, len(ps))
	for i, p := range ps {
		p.Shape = append([]int(nil), p.Shape...)
		out[i] = p
	}
	return out
}

// Forward runs the model on inputs, bound to Inputs() in order, each with its
// full shape including the batch dimension (a compile-time input with its
// declared shape), and returns every graph output with its full shape.
// Floating-point inputs of any precision are widened to the engine's;
// integer and boolean inputs that the model computes with at run time (the
// indices of a Gather, say) are held as floating-point numbers, which must
// represent them exactly (magnitudes up to 2^24 on the Float32 engine,
// 2^53 on Float64). Floating-point outputs are Float tensors on the
// Float32 engine and Double tensors on the Float64 engine; integer and
// boolean outputs have their declared type. A batch larger than
// Options.MaxBatch is run in chunks along the first dimension.
func (nw *Network) Forward(ctx context.Context, inputs []*onnxlite.Tensor) (outs []*onnxlite.Tensor, err error) {
	defer recoverEngine("nn: forward", &err)
	if len(inputs) != len(nw.inputs) {
		return nil, fmt.Errorf("nn: forward: %w: expected %d inputs (%s), got %d", ErrBadRequest, len(nw.inputs), portNames(nw.inputs), len(inputs))
	}
	var shapes [][]int
	var data [][]float64
	var fixed []*onnxlite.Tensor
	for i, t := range inputs {
		p := nw.inputs[i]
		if nw.unread[i] {
			continue
		}
		if t == nil {
			return nil, fmt.Errorf("nn: forward: input %q: %w: nil tensor", p.Name, ErrBadRequest)
		}
		if p.CompileTime {
			fixed = append(fixed, t)
			continue
		}
		vals, err := nw.feedValues(t, p)
		if err != nil {
			return nil, fmt.Errorf("nn: forward: input %q: %w", p.Name, err)
		}
		shape := t.Shape()
		if err := nw.checkInputShape(len(shapes), shape, len(vals)); err != nil {
			return nil, fmt.Errorf("nn: forward: %w", err)
		}
		shapes, data = append(shapes, shape), append(data, vals)
	}
	h, err := nw.newHeld(fixed)
	if err != nil {
		return nil, fmt.Errorf("nn: forward: %w", err)
	}
	res, outShapes, _, err := nw.runReq(ctx, shapes, data, request{held: h}, nil)
	if err != nil {
		return nil, modelError("nn: forward", err)
	}
	nw.mu.Lock()
	types := nw.outTypes
	nw.mu.Unlock()
	outs = make([]*onnxlite.Tensor, len(res))
	for i, r := range res {
		if types != nil && !isFloat(types[i]) {
			if outs[i], err = onnxlite.FromFloat64s(nw.outputs[i].Name, types[i], dims(outShapes[i]), r); err != nil {
				return nil, fmt.Errorf("nn: forward: %w: %v", ErrEngine, err)
			}
			continue
		}
		outs[i] = makeTensor(nw.outputs[i].Name, nw.opts.DType, outShapes[i], r)
	}
	return outs, nil
}

// modelError returns err as it is when it describes the model (invalid, or
// asking for what apportion does not compute), and prefixed with where
// otherwise.
func modelError(where string, err error) error {
	if errors.Is(err, onnxlite.ErrInvalid) || errors.Is(err, onnxlite.ErrUnsupported) {
		return err
	}
	return fmt.Errorf("%s: %w", where, err)
}

// exactInts is the largest magnitude below which the engine holds every
// integer exactly: 2^24 for float32, 2^53 for float64 (IEEE 754 binary32
// and binary64 significands).
func (nw *Network) exactInts() float64 {
	if nw.opts.DType == Float64 {
		return 1 << 53
	}
	return 1 << 24
}

// feedValues returns the elements of a tensor given for input p as the
// engine holds them: floating-point values widened, integers and booleans
// as numbers, which must be exact in the engine's type. A floating-point
// input takes any floating-point tensor, an integer or boolean one any
// integer or boolean tensor.
func (nw *Network) feedValues(t *onnxlite.Tensor, p Port) ([]float64, error) {
	if !numeric(t.DType) || (p.DType != onnxlite.Undefined && isFloat(p.DType) != isFloat(t.DType)) {
		return nil, fmt.Errorf("%w: expected a %v tensor, got %v", ErrBadRequest, p.DType, t.DType)
	}
	v, err := t.Float64s()
	if err != nil {
		return nil, fmt.Errorf("%w: %v", ErrBadRequest, err)
	}
	if int64(len(v)) != t.NumElements() {
		return nil, fmt.Errorf("%w: dims %v need %d elements, data has %d", ErrShape, t.Dims, t.NumElements(), len(v))
	}
	if !isFloat(t.DType) {
		limit := nw.exactInts()
		for i, x := range v {
			if math.Abs(x) > limit {
				return nil, fmt.Errorf("%w: %v value %v at position %d: the %v engine holds integers exactly only up to %.0f in magnitude; use the float64 engine", ErrBadRequest, t.DType, x, i, nw.opts.DType, limit)
			}
		}
	}
	return v, nil
}

func dims(shape []int) []int64 {
	d := make([]int64, len(shape))
	for i, s := range shape {
		d[i] = int64(s)
	}
	return d
}

func portNames(ps []Port) string {
	s := ""
	for i, p := range ps {
		if i > 0 {
			s += ", "
		}
		s += fmt.Sprintf("%q", p.Name)
	}
	return s
}

// checkInputShape compares a full shape of run-time input i (an index
// into feeds) with the declared one.
func (nw *Network) checkInputShape(i int, shape []int, n int) error {
	p := nw.feeds[i]
	decl := nw.declared[i]
	if decl != nil {
		want := shapeString(decl, true)
		if len(shape) != len(decl) {
			return fmt.Errorf("input %q: %w: expected shape %s (rank %d), got %v", p.Name, ErrShape, want, len(decl), shape)
		}
		for j := range shape {
			if shape[j] < 0 {
				return fmt.Errorf("input %q: %w: negative dimension in %v", p.Name, ErrShape, shape)
			}
			if j == 0 {
				continue // the batch: any size
			}
			if decl[j] >= 0 && decl[j] != shape[j] {
				return fmt.Errorf("input %q: %w: expected shape %s, got %v", p.Name, ErrShape, want, shape)
			}
		}
	}
	if prod(shape) != n {
		return fmt.Errorf("input %q: %w: shape %v holds %d values, got %d", p.Name, ErrShape, shape, prod(shape), n)
	}
	return nil
}

func shapeString(decl []int, batch bool) string {
	s := "["
	for j, d := range decl {
		if j > 0 {
			s += " "
		}
		switch {
		case j == 0 && batch:
			s += "N"
		case d < 0:
			s += "?"
		default:
			s += fmt.Sprint(d)
		}
	}
	return s + "]"
}

func prod(s []int) int {
	p := 1
	for _, d := range s {
		p *= d
	}
	return p
}

// recoverEngine turns a panic into an error wrapping ErrEngine. It is the
// package's one recovery boundary: every exported function and method that
// runs the engine defers it (and so does each goroutine a split call starts,
// another edge), so that a panic below them (gorgonia panics on some
// malformed graphs) reaches the caller as an error.
func recoverEngine(where string, err *error) {
	if r := recover(); r != nil {
		*err = fmt.Errorf("%s: %w: recovered panic: %v", where, ErrEngine, r)
	}
}

// checkFinite refuses NaN and ±Inf in x, naming the first position.
//
// v − v is +0 for every finite v and NaN for ±Inf and NaN (IEEE 754 §6.1,
// §6.2), and a sum with a NaN term is NaN: so eight values are tested with
// one compare, on four independent sums, and only a block that fails is
// searched. On mlp-s's forward pass at batch 1024 (30 720 values) this
// took the check from 10% of the CPU time to 4.5% (perf, Intel Xeon, one
// thread).
func checkFinite(x []float64, sample int) error {
	i := 0
	for ; i+8 <= len(x); i += 8 {
		b := x[i : i+8 : i+8]
		s0 := (b[0] - b[0]) + (b[4] - b[4])
		s1 := (b[1] - b[1]) + (b[5] - b[5])
		s2 := (b[2] - b[2]) + (b[6] - b[6])
		s3 := (b[3] - b[3]) + (b[7] - b[7])
		if (s0+s1)+(s2+s3) != 0 {
			break
		}
	}
	for ; i < len(x); i++ {
		if v := x[i]; v-v != 0 {
			return fmt.Errorf("%w: x[%d] (sample %d, element %d) is %v", ErrNonFinite, i, i/sample, i%sample, v)
		}
	}
	return nil
}
