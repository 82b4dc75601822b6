package httpapi

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"time"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/samples"
)

// coalesceWindow is how long a pass runner waits for more calls to stack
// when more requests are in flight than there are runners: most of a
// request's time is spent outside the model (HTTP, JSON, the document), so
// without a wait the calls of concurrent requests seldom meet
// (DEVELOPERS.md has the measurements).
const coalesceWindow = 200 * time.Microsecond

// coalesceMaxPoints is the largest stacked pass: the network's largest
// batch run as one program, so that a stacked pass is one program run.
const coalesceMaxPoints = nn.DefaultMaxBatch

// errBatcherClosed is returned to calls made after Close.
var errBatcherClosed = errors.New("the server is shutting down")

// batcher is a gradattr.Model that stacks the calls of concurrent requests
// into shared passes. Its runners each take the oldest waiting call and
// every waiting call of the same kind (forward or gradient) that still fits
// in coalesceMaxPoints points, run them as one batch and hand each caller
// its rows back; the calls of small requests are taken before those of
// heavy ones, so that a small request's passes do not wait behind theirs. Samples do not interact in a batch (nn.Head.Gradient), so
// each caller gets the values it would have got alone. A runner waits up to
// window for more calls only while more requests are in flight than there
// are runners, so that light traffic never waits.
//
// A stacked batch is padded, with copies of its first point, to the next
// power of two, so that the network compiles a handful of batch sizes
// rather than one program per sum of request sizes.
type batcher struct {
	m       gradattr.Model
	size    int // values per sample
	nout    int // outputs per sample
	max     int
	calls   chan *stackedCall // of heavy requests
	urgent  chan *stackedCall // of small ones, taken first
	quit    chan struct{}
	wg      sync.WaitGroup
	metrics *metrics
	once    sync.Once
	// window is how long a runner waits for more calls to stack while
	// busy reports more than one request in flight.
	window  time.Duration
	busy    func() int
	runners int
}

// stackedCall is one Forward or Gradient call waiting for a runner.
type stackedCall struct {
	ctx    context.Context
	grad   bool
	x      []float64
	n      int
	target []int
	out, g []float64
	err    error
	done   chan struct{}
}

func newBatcher(m gradattr.Model, runners, maxPoints int, window time.Duration, busy func() int, metrics *metrics) *batcher {
	b := &batcher{
		m: m, size: samples.Product(m.InputShape()), nout: m.OutputSize(), max: maxPoints,
		calls: make(chan *stackedCall, 1024), urgent: make(chan *stackedCall, 1024), quit: make(chan struct{}), metrics: metrics,
		window: window, busy: busy, runners: runners,
	}
	b.wg.Add(runners)
	for range runners {
		go b.runner()
	}
	return b
}

// InputShape returns the model's input shape.
func (b *batcher) InputShape() []int { return b.m.InputShape() }

// OutputSize returns the model's output count.
func (b *batcher) OutputSize() int { return b.m.OutputSize() }

// Forward evaluates n samples, stacked with other waiting calls.
func (b *batcher) Forward(ctx context.Context, x []float64, n int) ([]float64, error) {
	out, _, err := b.do(ctx, &stackedCall{x: x, n: n})
	return out, err
}

// Gradient evaluates n samples and their gradients, stacked with other
// waiting calls.
// PiecewiseLinear and IntegratePath pass exact path integrals through to
// the model without stacking: an exact integral is one call per sample
// and baseline, which walks the path itself.
func (b *batcher) PiecewiseLinear() error { return piecewiseLinear(b.m) }

// IntegratePath is the model's (see PiecewiseLinear).
func (b *batcher) IntegratePath(ctx context.Context, from, to []float64, target, maxPieces int) ([]float64, int, error) {
	return integratePath(ctx, b.m, from, to, target, maxPieces)
}

// GradientSum and PathGradientSum pass gradient sums through to the model
// without stacking: a sum is one call for all the points of a pass, which
// the model runs in its own batches, and stacking it with other requests'
// calls would change how it rounds.
func (b *batcher) GradientSum(ctx context.Context, x []float64, n int, weight []float64, target int) ([]float64, []float64, error) {
	return gradientSum(ctx, b.m, x, n, weight, target)
}

// PathGradientSum is the model's (see GradientSum).
func (b *batcher) PathGradientSum(ctx context.Context, from, to, alpha, weight []float64, target int) ([]float64, []float64, error) {
	return pathGradientSum(ctx, b.m, from, to, alpha, weight, target)
}

func (b *batcher) Gradient(ctx context.Context, x []float64, n int, target []int) ([]float64, []float64, error) {
	return b.do(ctx, &stackedCall{grad: true, x: x, n: n, target: target})
}

func (b *batcher) do(ctx context.Context, c *stackedCall) ([]float64, []float64, error) {
	if c.n < 1 || c.n > b.max || len(c.x) != c.n*b.size || (c.grad && len(c.target) != c.n) {
		// Too large to gain from stacking, or malformed: the model judges.
		if c.grad {
			return b.m.Gradient(ctx, c.x, c.n, c.target)
		}
		out, err := b.m.Forward(ctx, c.x, c.n)
		return out, nil, err
	}
	// The caller may reuse x once the call returns, and it returns early
	// when its context ends: the runner works on copies.
	c.ctx = ctx
	c.x = append([]float64(nil), c.x...)
	c.target = append([]int(nil), c.target...)
	c.done = make(chan struct{})
	lane := b.urgent
	if isHeavy(ctx) {
		lane = b.calls
	}
	select {
	case lane <- c:
	case <-ctx.Done():
		return nil, nil, ctx.Err()
	case <-b.quit:
		return nil, nil, errBatcherClosed
	}
	select {
	case <-c.done:
		return c.out, c.g, c.err
	case <-ctx.Done():
		return nil, nil, ctx.Err()
	case <-b.quit:
		return nil, nil, errBatcherClosed
	}
}

func (b *batcher) runner() {
	defer b.wg.Done()
	var carry *stackedCall
	group := make([]*stackedCall, 0, b.max)
	for {
		first := carry
		carry = nil
		if first == nil {
			if first = b.poll(); first == nil {
				select {
				case first = <-b.urgent:
				case first = <-b.calls:
				case <-b.quit:
					return
				}
			}
		}
		group = append(group[:0], first)
		total := first.n
		var window <-chan time.Time
		var timer *time.Timer
		if b.window > 0 && b.busy() > b.runners {
			// More requests are being computed than there are runners:
			// the CPU is the limit, and their next calls are worth
			// waiting a moment for.
			timer = time.NewTimer(b.window)
			window = timer.C
		}
	drain:
		for total < b.max {
			c := b.poll()
			if c == nil {
				if window == nil {
					break drain
				}
				select {
				case c = <-b.urgent:
				case c = <-b.calls:
				case <-window:
					break drain
				}
			}
			if c.grad != first.grad || total+c.n > b.max {
				carry = c
				break drain
			}
			group = append(group, c)
			total += c.n
		}
		if timer != nil {
			timer.Stop()
		}
		b.run(group)
	}
}

// poll takes a waiting call without blocking, one of a small request
// first; nil when none waits.
func (b *batcher) poll() *stackedCall {
	select {
	case c := <-b.urgent:
		return c
	default:
	}
	select {
	case c := <-b.urgent:
		return c
	case c := <-b.calls:
		return c
	default:
		return nil
	}
}

// heavyKey marks the context of a heavy request (see workPool).
type heavyKey struct{}

func withHeavy(ctx context.Context) context.Context { return context.WithValue(ctx, heavyKey{}, true) }

func isHeavy(ctx context.Context) bool { v, _ := ctx.Value(heavyKey{}).(bool); return v }

// run evaluates the calls of group, of one kind, as one pass.
func (b *batcher) run(group []*stackedCall) {
	live := group[:0:0]
	for _, c := range group {
		if err := c.ctx.Err(); err != nil {
			c.err = err // given up: costs no pass
			close(c.done)
			continue
		}
		live = append(live, c)
	}
	if len(live) == 0 {
		return
	}
	b.metrics.stacked.Observe(float64(len(live)))
	if len(live) == 1 {
		c := live[0]
		if c.grad {
			c.out, c.g, c.err = b.m.Gradient(c.ctx, c.x, c.n, c.target)
		} else {
			c.out, c.err = b.m.Forward(c.ctx, c.x, c.n)
		}
		close(c.done)
		return
	}
	total := 0
	for _, c := range live {
		total += c.n
	}
	n := 1
	for n < total {
		n *= 2
	}
	n = min(n, b.max)
	x := make([]float64, 0, n*b.size)
	target := make([]int, 0, n)
	for _, c := range live {
		x = append(x, c.x...)
		target = append(target, c.target...)
	}
	for i := total; i < n; i++ {
		x = append(x, live[0].x[:b.size]...)
		target = append(target, 0)
	}
	// The pass serves several requests, so no single request's context
	// may cancel it; a pass is one batch, and every caller whose context
	// has ended stops at its next call.
	ctx := context.Background()
	var out, g []float64
	var err error
	if live[0].grad {
		out, g, err = b.m.Gradient(ctx, x, n, target)
	} else {
		out, err = b.m.Forward(ctx, x, n)
	}
	if err == nil && (len(out) != n*b.nout || (live[0].grad && len(g) != n*b.size)) {
		err = fmt.Errorf("stacked pass of %d samples returned %d outputs and %d gradient values", n, len(out), len(g))
	}
	lo := 0
	for _, c := range live {
		if err != nil {
			c.err = err
		} else {
			c.out = out[lo*b.nout : (lo+c.n)*b.nout : (lo+c.n)*b.nout]
			if c.grad {
				c.g = g[lo*b.size : (lo+c.n)*b.size : (lo+c.n)*b.size]
			}
		}
		lo += c.n
		close(c.done)
	}
}

// Close stops the runners. Calls still waiting get errBatcherClosed.
func (b *batcher) Close() {
	b.once.Do(func() { close(b.quit) })
	b.wg.Wait()
}
