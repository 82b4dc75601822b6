//go:build !linux

package nn

// threadCPU is 0 where the thread's CPU clock is not read: cpuLoop then
// reports the wall-clock rate only.
func threadCPU() float64 { return 0 }
