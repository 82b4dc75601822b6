package httpapi

import (
	"context"
	"errors"
	"runtime"
	"sync"
)

// errQueueFull is returned by submit when the job can neither start nor
// wait: every worker it may use is busy and the queue holds as many
// requests as it may.
var errQueueFull = errors.New("the work queue is full")

// job is one request's computation.
type job struct {
	ctx  context.Context
	run  func(ctx context.Context)
	done chan struct{} // closed when run has returned or was skipped
	// heavy marks a request whose work is over the pool's share for
	// small requests (see workPool).
	heavy bool
	// skipped is set when the request's context had ended before a worker
	// took the job, so run was not called.
	skipped bool
}

// workPool runs jobs on a fixed number of workers, with a bounded queue in
// front of them: a request either finds room or is refused at once. Heavy
// jobs run on at most heavySlots workers at a time (see heavySlotsFor), so
// that the others stay free for small requests, which no heavy request can
// then hold up;
// a free worker takes the oldest small job first, then the oldest heavy
// one if a heavy slot is free.
type workPool struct {
	metrics *metrics
	wg      sync.WaitGroup

	mu           sync.Mutex
	wake         *sync.Cond
	small, heavy []*job // waiting, oldest first
	queue        int    // jobs that may wait
	workers      int
	heavySlots   int
	running      int
	heavyRunning int
	closed       bool
}

// heavySlotsFor is the number of workers heavy jobs may hold: three
// quarters (rounded down, at least one) of the workers and of the cores,
// whichever is fewer, so that small requests find both a worker and a core.
func heavySlotsFor(workers, procs int) int {
	share := func(n int) int { return n - (n+3)/4 }
	return max(1, min(share(workers), share(procs)))
}

func newWorkPool(workers, queue int, m *metrics) *workPool {
	p := &workPool{metrics: m, queue: queue, workers: workers, heavySlots: heavySlotsFor(workers, runtime.GOMAXPROCS(0))}
	p.wake = sync.NewCond(&p.mu)
	p.wg.Add(workers)
	for range workers {
		go p.work()
	}
	return p
}

// next waits for a job this worker may start and takes it; nil once the
// pool is closed and no job waits.
func (p *workPool) next() *job {
	p.mu.Lock()
	defer p.mu.Unlock()
	for {
		switch {
		case len(p.small) > 0:
			j := p.small[0]
			p.small = p.small[1:]
			return p.start(j)
		case len(p.heavy) > 0 && p.heavyRunning < p.heavySlots:
			j := p.heavy[0]
			p.heavy = p.heavy[1:]
			return p.start(j)
		case p.closed && len(p.heavy) == 0:
			return nil
		}
		p.wake.Wait()
	}
}

// start counts j as running; p.mu is held.
func (p *workPool) start(j *job) *job {
	p.running++
	if j.heavy {
		p.heavyRunning++
	}
	p.metrics.queueDepth.Dec()
	return j
}

func (p *workPool) work() {
	defer p.wg.Done()
	for j := p.next(); j != nil; j = p.next() {
		if j.ctx.Err() != nil {
			// Given up while waiting: spend nothing on it.
			j.skipped = true
		} else {
			p.metrics.inFlight.Inc()
			j.run(j.ctx)
			p.metrics.inFlight.Dec()
		}
		p.mu.Lock()
		p.running--
		if j.heavy {
			p.heavyRunning--
		}
		p.mu.Unlock()
		p.wake.Broadcast() // a heavy slot may be free
		close(j.done)
	}
}

// Active is the number of jobs being run.
func (p *workPool) Active() int {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.running
}

// submit queues j, or returns errQueueFull without waiting: j is taken
// when a worker it may use is idle, or when fewer jobs wait than the queue
// holds.
func (p *workPool) submit(j *job) error {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.closed {
		return errQueueFull
	}
	waiting := len(p.small) + len(p.heavy)
	idle := p.workers - p.running - waiting
	if j.heavy {
		idle = min(idle, p.heavySlots-p.heavyRunning-len(p.heavy))
	}
	if idle <= 0 && waiting >= p.queue {
		return errQueueFull
	}
	if j.heavy {
		p.heavy = append(p.heavy, j)
	} else {
		p.small = append(p.small, j)
	}
	p.metrics.queueDepth.Inc()
	p.wake.Broadcast()
	return nil
}

// Close stops accepting jobs and waits for the workers to finish the
// queued ones.
func (p *workPool) Close() {
	p.mu.Lock()
	p.closed = true
	p.mu.Unlock()
	p.wake.Broadcast()
	p.wg.Wait()
}
