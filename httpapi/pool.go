package httpapi

import (
	"context"
	"errors"
	"sync"
	"sync/atomic"
)

// errQueueFull is returned by submit when every worker is busy and the
// queue holds as many requests as it may.
var errQueueFull = errors.New("the work queue is full")

// job is one request's computation.
type job struct {
	ctx  context.Context
	run  func(ctx context.Context)
	done chan struct{} // closed when run has returned or was skipped
	// skipped is set when the request's context had ended before a worker
	// took the job, so run was not called.
	skipped bool
}

// workPool runs jobs on a fixed number of workers, with a bounded queue in
// front of them: a request either finds room or is refused at once.
type workPool struct {
	jobs    chan *job
	metrics *metrics
	wg      sync.WaitGroup
	active  atomic.Int64 // jobs being run

	mu     sync.RWMutex
	closed bool
}

func newWorkPool(workers, queue int, m *metrics) *workPool {
	p := &workPool{jobs: make(chan *job, queue), metrics: m}
	p.wg.Add(workers)
	for range workers {
		go p.work()
	}
	return p
}

func (p *workPool) work() {
	defer p.wg.Done()
	for j := range p.jobs {
		p.metrics.queueDepth.Dec()
		if j.ctx.Err() != nil {
			// Given up while waiting: spend nothing on it.
			j.skipped = true
			close(j.done)
			continue
		}
		p.metrics.inFlight.Inc()
		p.active.Add(1)
		j.run(j.ctx)
		p.active.Add(-1)
		p.metrics.inFlight.Dec()
		close(j.done)
	}
}

// Active is the number of jobs being run.
func (p *workPool) Active() int { return int(p.active.Load()) }

// submit queues j, or returns errQueueFull without waiting.
func (p *workPool) submit(j *job) error {
	p.mu.RLock()
	defer p.mu.RUnlock()
	if p.closed {
		return errQueueFull
	}
	p.metrics.queueDepth.Inc()
	select {
	case p.jobs <- j:
		return nil
	default:
		p.metrics.queueDepth.Dec()
		return errQueueFull
	}
}

// Close stops accepting jobs and waits for the workers to finish the
// queued ones.
func (p *workPool) Close() {
	p.mu.Lock()
	if !p.closed {
		p.closed = true
		close(p.jobs)
	}
	p.mu.Unlock()
	p.wg.Wait()
}
