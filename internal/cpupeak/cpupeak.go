// Package cpupeak measures this core's float32 fused multiply-add ceiling
// with a register-only loop, the denominator of the "share of peak" that
// benchmarks report.
package cpupeak

import "time"

// FlopsPerIteration is the floating-point operations one iteration of Loop
// performs: 12 independent 8-wide fused multiply-adds, 2 operations per lane.
const FlopsPerIteration = 12 * 8 * 2

// Available reports whether Loop runs FMA instructions on this CPU; when it
// is false Loop does nothing and GFLOPS returns 0.
func Available() bool { return available }

// Loop runs n iterations of the register-only FMA loop (n ≤ 0 does nothing).
func Loop(n int) {
	if available && n > 0 {
		fmaLoop(n)
	}
}

// GFLOPS runs Loop for about d in ten trials and returns the best rate in
// GFLOP/s, so that a busy machine lowers it less; 0 when Loop is not
// available. It measures one goroutine, so one core.
func GFLOPS(d time.Duration) float64 {
	if !available {
		return 0
	}
	const iters = 1 << 14
	best := 0.0
	for trial := 0; trial < 10; trial++ {
		calls := 0
		start := time.Now()
		for time.Since(start) < d/10 {
			fmaLoop(iters)
			calls++
		}
		best = max(best, float64(calls)*FlopsPerIteration*iters/time.Since(start).Seconds()/1e9)
	}
	return best
}
