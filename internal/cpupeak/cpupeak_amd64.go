//go:build amd64 && !purego

package cpupeak

import "golang.org/x/sys/cpu"

var (
	available = cpu.X86.HasAVX2 && cpu.X86.HasFMA
	wide      = available && cpu.X86.HasAVX512F
	lanes     = 8 // float32 lanes of the loop's vectors
)

func init() {
	if wide {
		lanes = 16
	}
}

// fmaLoop runs the loop of fma_amd64.s on the widest vectors the CPU has.
func fmaLoop(n int) {
	if wide {
		fmaLoop512(n)
		return
	}
	fmaLoop256(n)
}

// fmaLoop256 and fmaLoop512 are the loops in fma_amd64.s.
//
//go:noescape
func fmaLoop256(n int)

//go:noescape
func fmaLoop512(n int)
