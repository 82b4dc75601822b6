//go:build !linux

package cpupeak

// threadCPU is 0 where the thread's CPU clock is not read: Bench then
// reports the wall-clock rate only.
func threadCPU() float64 { return 0 }
