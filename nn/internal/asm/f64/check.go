package f64

import "fmt"

// checkAccum panics when AccumRows's slices are too short for its
// arguments: the assembly does not check its pointers.
func checkAccum(dst, x, b []float64, ldb int) {
	if len(x) == 0 || len(dst) == 0 {
		return
	}
	if ldb < len(dst) || len(b) < (len(x)-1)*ldb+len(dst) {
		panic(fmt.Sprintf("nn: f64: %d rows of %d values with stride %d from %d values", len(x), len(dst), ldb, len(b)))
	}
}
