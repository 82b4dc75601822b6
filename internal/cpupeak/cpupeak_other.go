//go:build !amd64 || purego

package cpupeak

const (
	available = false
	lanes     = 8
)

func fmaLoop(int) {}
