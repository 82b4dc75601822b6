package explain

import "fmt"

// guard is the package's one recovery point, at its edge with the engine:
// it runs a call into onnxlite or nn and turns a panic there into an error,
// so that a malformed model or a fault in the engine fails one call (one
// request of a server), not the process. Calls into a gradattr.Model made
// by the attribution methods are guarded by gradattr itself.
func guard(f func() error) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("internal error: %v", r)
		}
	}()
	return f()
}
