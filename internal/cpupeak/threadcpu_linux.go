//go:build linux

package cpupeak

import "golang.org/x/sys/unix"

// threadCPU is the CPU time the calling OS thread has run, in seconds.
func threadCPU() float64 {
	var ts unix.Timespec
	if err := unix.ClockGettime(unix.CLOCK_THREAD_CPUTIME_ID, &ts); err != nil {
		return 0
	}
	return float64(ts.Sec) + float64(ts.Nsec)*1e-9
}
