// Package cpupeak measures this core's float32 fused multiply-add ceiling
// with a register-only loop, the denominator of the "share of peak" that
// benchmarks report: on 512-bit vectors where the CPU has AVX-512, as the
// engine's tiles then run, else on 256-bit ones.
package cpupeak

import "time"

// FlopsPerIteration is the floating-point operations one iteration of Loop
// performs: 12 independent fused multiply-adds, 16 lanes wide with AVX-512
// and 8 without, 2 operations per lane.
func FlopsPerIteration() float64 { return float64(12 * lanes * 2) }

// Vector names the vectors Loop runs on: "512-bit" or "256-bit".
func Vector() string {
	if lanes == 16 {
		return "512-bit"
	}
	return "256-bit"
}

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
		best = max(best, float64(calls)*FlopsPerIteration()*iters/time.Since(start).Seconds()/1e9)
	}
	return best
}
