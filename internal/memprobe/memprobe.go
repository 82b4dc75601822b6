// Package memprobe measures the heap a call uses, for benchmarks and tests
// only: the peak reported beside a memory bound, and the bytes allocated
// that a test bounds.
package memprobe

import (
	"runtime"
	"runtime/metrics"
	"time"
)

// heapObjects is the heap held by objects, live or not yet swept.
const heapObjects = "/memory/classes/heap/objects:bytes"

// Measure runs f and returns the largest heap of objects seen while it
// ran above the heap before it (sampled every 100 µs, so a peak shorter
// than that may be missed) and the bytes f allocated, which bound the
// peak from above.
func Measure(f func()) (peak, allocated uint64) {
	runtime.GC()
	sample := []metrics.Sample{{Name: heapObjects}}
	metrics.Read(sample)
	base := sample[0].Value.Uint64()
	var before, after runtime.MemStats
	runtime.ReadMemStats(&before)

	stop, done := make(chan struct{}), make(chan uint64)
	go func() {
		s := []metrics.Sample{{Name: heapObjects}}
		top := base
		tick := time.NewTicker(100 * time.Microsecond)
		defer tick.Stop()
		for {
			metrics.Read(s)
			top = max(top, s[0].Value.Uint64())
			select {
			case <-stop:
				done <- top
				return
			case <-tick.C:
			}
		}
	}()
	f()
	close(stop)
	top := <-done
	runtime.ReadMemStats(&after)
	return top - base, after.TotalAlloc - before.TotalAlloc
}
