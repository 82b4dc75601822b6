//go:build unix

package onnxlite

import (
	"os"
	"syscall"
)

// openNonBlocking opens path for reading without waiting for a FIFO's
// writer; reading a regular file is unaffected by O_NONBLOCK.
func openNonBlocking(path string) (*os.File, error) {
	return os.OpenFile(path, os.O_RDONLY|syscall.O_NONBLOCK, 0)
}
