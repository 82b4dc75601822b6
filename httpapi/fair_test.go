package httpapi

import (
	"context"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
)

func TestWorkPoolKeepsWorkersForSmallJobs(t *testing.T) {
	// Four workers on four cores: heavy jobs hold at most three; with five heavy jobs
	// blocked, a small job still runs at once, and the heavy jobs waiting
	// start as slots free up, in order.
	p := newWorkPool(4, 8, newMetrics())
	defer p.Close()
	p.heavySlots = heavySlotsFor(4, 4) // whatever this machine's cores
	release := make(chan struct{})
	var mu sync.Mutex
	var started []int
	heavy := func(i int) *job {
		return &job{ctx: context.Background(), heavy: true, done: make(chan struct{}), run: func(context.Context) {
			mu.Lock()
			started = append(started, i)
			mu.Unlock()
			<-release
		}}
	}
	var jobs []*job
	for i := range 5 {
		jobs = append(jobs, heavy(i))
		require.NoError(t, p.submit(jobs[i]))
	}
	waitFor(t, "three heavy jobs to start", func() bool { return p.Active() == 3 })
	small := &job{ctx: context.Background(), done: make(chan struct{}), run: func(context.Context) {}}
	require.NoError(t, p.submit(small))
	select {
	case <-small.done:
	case <-time.After(10 * time.Second):
		t.Fatal("a small job waited behind heavy ones")
	}
	mu.Lock()
	assert.Equal(t, []int{0, 1, 2}, started)
	mu.Unlock()
	close(release)
	for _, j := range jobs {
		<-j.done
	}
	assert.Equal(t, []int{0, 1, 2, 3, 4}, started)
	assert.Equal(t, 3, heavySlotsFor(4, 4))
	assert.Equal(t, 1, heavySlotsFor(1, 8))
	assert.Equal(t, 1, heavySlotsFor(8, 2))
	assert.Equal(t, 6, heavySlotsFor(32, 8))
}

func TestBatcherRunsSmallRequestsFirst(t *testing.T) {
	// One runner is held by a heavy request's pass; three more heavy
	// passes of 64 points wait, then one small request's pass of one
	// point arrives: it runs next, before the heavy ones (a pass of 64
	// cannot stack with another call).
	f := &gradattr.Func{
		Shape: []int{1}, Outputs: 1,
		F:    func(out, x []float64) { out[0] = x[0] },
		Grad: func(grad, _ []float64, _ int) { grad[0] = 1 },
	}
	g := &gatedModel{m: f, open: make(chan struct{}), first: make(chan struct{})}
	b := newBatcher(g, 1, 64, 0, func() int { return 0 }, newMetrics())
	defer b.Close()
	heavyCtx := withHeavy(context.Background())
	var wg sync.WaitGroup
	call := func(ctx context.Context, n int) {
		defer wg.Done()
		_, err := b.Forward(ctx, make([]float64, n), n)
		assert.NoError(t, err)
	}
	wg.Add(1)
	go call(heavyCtx, 64)
	<-g.first
	wg.Add(3)
	for range 3 {
		go call(heavyCtx, 64)
	}
	waitFor(t, "the heavy calls to queue", func() bool { return len(b.calls) == 3 })
	wg.Add(1)
	go call(context.Background(), 1)
	waitFor(t, "the small call to queue", func() bool { return len(b.urgent) == 1 })
	close(g.open)
	wg.Wait()
	g.mu.Lock()
	defer g.mu.Unlock()
	assert.Equal(t, []int{64, 1, 64, 64, 64}, g.sizes)
}
