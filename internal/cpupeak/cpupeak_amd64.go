//go:build amd64 && !purego

package cpupeak

import "golang.org/x/sys/cpu"

var available = cpu.X86.HasAVX2 && cpu.X86.HasFMA

// fmaLoop is the loop in fma_amd64.s.
//
//go:noescape
func fmaLoop(n int)
