package gradattr

import (
	"context"
	"fmt"
	"math"
	"time"
)

// DefaultBatchSize is the number of points sent to the model per call when
// an options struct leaves BatchSize at zero.
//
// The methods write the points of every call into one buffer that they
// reuse for the next call, so a Model must not keep x after Forward or
// Gradient returns. The methods keep no shared state and may run
// concurrently, on the same Model if the Model allows it.
const DefaultBatchSize = 64

// engine sends points to a Model in chunks of at most batch samples, reusing
// one point buffer for every chunk, and counts the cost. Points are produced
// and consumed strictly in index order, so every sum a method accumulates
// sees the same operands in the same order whatever the batch size: results
// are bit-identical across batch sizes, provided the model's values for one
// sample do not depend on the other samples of its batch.
type engine struct {
	ctx   context.Context
	m     Model
	shape []int
	size  int // features per sample
	nout  int // outputs per sample
	batch int
	buf   []float64
	tgt   []int
	cost  Cost
	begin time.Time

	x       []float64 // the sample
	outputs []float64 // f(x)
	target  int
}

// newEngine validates the model, the batch size, the sample and the target,
// evaluates f(x) and resolves TargetTop.
func newEngine(ctx context.Context, m Model, x []float64, target, batch int) (*engine, error) {
	e := &engine{ctx: ctx, m: m, begin: time.Now()}
	if ctx == nil {
		return nil, fmt.Errorf("%w: nil context", ErrOptions)
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	if m == nil {
		return nil, fmt.Errorf("%w: nil model", ErrModel)
	}
	var err error
	if err = callSafe("InputShape", func() { e.shape = m.InputShape() }); err != nil {
		return nil, err
	}
	if e.size, err = shapeSize(e.shape); err != nil {
		return nil, err
	}
	if err = callSafe("OutputSize", func() { e.nout = m.OutputSize() }); err != nil {
		return nil, err
	}
	if e.nout <= 0 {
		return nil, fmt.Errorf("%w: model has %d outputs, want > 0", ErrModel, e.nout)
	}
	switch {
	case batch == 0:
		batch = DefaultBatchSize
	case batch < 0 || batch > MaxBatchSize:
		return nil, fmt.Errorf("%w: batch size %d, want 0 (default %d) or 1..%d", ErrOptions, batch, DefaultBatchSize, MaxBatchSize)
	}
	if batch*e.size > MaxEvaluations {
		batch = max(1, MaxEvaluations/e.size)
	}
	e.batch = batch
	if err := checkSample("input", x, e.shape, e.size); err != nil {
		return nil, err
	}
	e.x = x
	out, err := e.forwardOne(x)
	if err != nil {
		return nil, err
	}
	e.outputs = out
	switch {
	case target == TargetTop:
		target = Top(out)
	case target < 0 || target >= e.nout:
		return nil, fmt.Errorf("%w: target %d, model has outputs 0..%d", ErrInput, target, e.nout-1)
	}
	e.target = target
	return e, nil
}

// grow makes the point buffer hold n samples (n ≤ batch).
func (e *engine) grow(n int) []float64 {
	if cap(e.buf) < n*e.size {
		e.buf = make([]float64, e.batch*e.size)
		e.tgt = make([]int, e.batch)
	}
	return e.buf[:n*e.size]
}

// forwardOne evaluates one sample without copying it into the buffer.
func (e *engine) forwardOne(x []float64) ([]float64, error) {
	var out []float64
	err := e.call("Forward", func() (err error) {
		out, err = e.m.Forward(e.ctx, x, 1)
		return err
	})
	if err != nil {
		return nil, err
	}
	e.cost.ForwardPasses++
	if err := checkReturned("Forward", out, e.nout, 1); err != nil {
		return nil, err
	}
	return out, nil
}

// forward evaluates the target output of n points, fill(i, dst) writing
// point i, and calls use(i, outputs of point i) in order.
func (e *engine) forward(n int, fill func(i int, dst []float64), use func(i int, out []float64)) error {
	for lo := 0; lo < n; lo += e.batch {
		k := min(e.batch, n-lo)
		buf := e.grow(k)
		for j := 0; j < k; j++ {
			fill(lo+j, buf[j*e.size:(j+1)*e.size])
		}
		var out []float64
		err := e.call("Forward", func() (err error) {
			out, err = e.m.Forward(e.ctx, buf, k)
			return err
		})
		if err != nil {
			return err
		}
		e.cost.ForwardPasses += k
		if err := checkReturned("Forward", out, e.nout, k); err != nil {
			return err
		}
		for j := 0; j < k; j++ {
			use(lo+j, out[j*e.nout:(j+1)*e.nout])
		}
	}
	return nil
}

// gradients evaluates the gradient of the target output at n points and
// calls use(i, outputs, gradient) for each point in order.
func (e *engine) gradients(n int, fill func(i int, dst []float64), use func(i int, out, grad []float64)) error {
	for lo := 0; lo < n; lo += e.batch {
		k := min(e.batch, n-lo)
		buf := e.grow(k)
		tgt := e.tgt[:k]
		for j := 0; j < k; j++ {
			fill(lo+j, buf[j*e.size:(j+1)*e.size])
			tgt[j] = e.target
		}
		var out, grad []float64
		err := e.call("Gradient", func() (err error) {
			out, grad, err = e.m.Gradient(e.ctx, buf, k, tgt)
			return err
		})
		if err != nil {
			return err
		}
		e.cost.GradientEvals += k
		if err := checkReturned("Gradient outputs", out, e.nout, k); err != nil {
			return err
		}
		if err := checkReturned("Gradient", grad, e.size, k); err != nil {
			return err
		}
		for j := 0; j < k; j++ {
			use(lo+j, out[j*e.nout:(j+1)*e.nout], grad[j*e.size:(j+1)*e.size])
		}
	}
	return nil
}

// call runs one model call: it checks the context first, recovers a panic
// and returns the context's own error when the call failed because the
// context ended.
func (e *engine) call(what string, f func() error) (err error) {
	if err := e.ctx.Err(); err != nil {
		return err
	}
	func() {
		defer recovered(&err, ErrModel, "model "+what, "")
		err = f()
	}()
	if err != nil {
		if cerr := e.ctx.Err(); cerr != nil {
			return cerr
		}
		return fmt.Errorf("%w: %s: %w", ErrModel, what, err)
	}
	return nil
}

// result assembles a Result around attr.
func (e *engine) result(attr []float64, s Settings) *Result {
	e.cost.Elapsed = time.Since(e.begin)
	return &Result{
		Attributions: attr,
		Shape:        append([]int(nil), e.shape...),
		Target:       e.target,
		Output:       e.outputs[e.target],
		Outputs:      append([]float64(nil), e.outputs...),
		Cost:         e.cost,
		Settings:     s,
	}
}

// callSafe runs f, turning a panic into an ErrModel error.
func callSafe(what string, f func()) (err error) {
	defer recovered(&err, ErrModel, "model "+what, "")
	f()
	return nil
}

// checkReturned checks that a model returned n·per finite values.
func checkReturned(what string, v []float64, per, n int) error {
	if len(v) != per*n {
		return fmt.Errorf("%w: %s returned %d values for %d samples, want %d", ErrModel, what, len(v), n, per*n)
	}
	for i, f := range v {
		if math.IsNaN(f) || math.IsInf(f, 0) {
			return fmt.Errorf("%w: %s returned %v at sample %d, value %d", ErrModel, what, f, i/per, i%per)
		}
	}
	return nil
}

// checkSample checks that x is one finite sample of the given shape.
func checkSample(what string, x []float64, shape []int, size int) error {
	if len(x) != size {
		return fmt.Errorf("%w: %s has %d values, model expects %d (shape %v)", ErrInput, what, len(x), size, shape)
	}
	for i, v := range x {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Errorf("%w: %s value %d (position %v) is %v, want a finite number", ErrInput, what, i, position(i, shape), v)
		}
	}
	return nil
}

// position turns a row-major flat index into a multi-index.
func position(i int, shape []int) []int {
	pos := make([]int, len(shape))
	for a := len(shape) - 1; a >= 0; a-- {
		pos[a] = i % shape[a]
		i /= shape[a]
	}
	return pos
}

// completeness builds the report for sum against out − base.
func completeness(attr []float64, out, base, tol float64, judged bool) *Completeness {
	sum := 0.0
	for _, a := range attr {
		sum += a
	}
	want := out - base
	gap := sum - want
	rel := math.Abs(gap) / math.Max(math.Abs(want), CompletenessFloor)
	return &Completeness{
		Sum: sum, Expected: want, Gap: gap, RelativeGap: rel,
		Tolerance: tol, Judged: judged, OK: judged && (rel <= tol || math.Abs(gap) <= outputResolution(out, base)),
	}
}

// outputResolution is the smallest gap completeness can tell from rounding
// when the outputs f(x) and f(x′) are float32 values (a float32 model's):
// two units in the last place, in float32, of the larger of |f(x)|,
// |f(x′)| (half a unit of rounding in each, and some in the attributions'
// float32 arithmetic; common practice: compare within a few ulps). It is
// 0 for other outputs. It matters only where the change of the output is
// small against the output itself: a probability near 1 that moves by
// 10⁻⁷, a score of 10⁴ that moves by 0.1.
func outputResolution(out, base float64) float64 {
	if float64(float32(out)) != out || float64(float32(base)) != base {
		return 0
	}
	m := float32(max(math.Abs(out), math.Abs(base)))
	return 2 * float64(math.Nextafter32(m, float32(math.Inf(1)))-m)
}
