package cpupeak

import (
	"runtime"
	"testing"
)

// Bench runs f b.N times on one locked OS thread and reports flops per
// second of wall-clock time ("GFLOP/s") and of that thread's CPU time
// ("GFLOP/s-cpu"): on a shared machine the thread's CPU time leaves out the
// time other processes hold the core, so A/B comparisons stay readable.
func Bench(b *testing.B, flops float64, f func()) {
	runtime.LockOSThread()
	defer runtime.UnlockOSThread()
	t0 := threadCPU()
	for b.Loop() {
		f()
	}
	cpu := threadCPU() - t0
	b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
	if cpu > 0 {
		b.ReportMetric(flops*float64(b.N)/cpu/1e9, "GFLOP/s-cpu")
	}
}
