//go:build !amd64 || purego

package cpupeak

const available = false

func fmaLoop(int) {}
