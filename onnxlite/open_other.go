//go:build !unix

package onnxlite

import "os"

// openNonBlocking opens path for reading; systems without FIFOs that block
// an open need nothing more.
func openNonBlocking(path string) (*os.File, error) { return os.Open(path) }
