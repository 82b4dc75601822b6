// Package f64 holds the float64 kernels of nn's path plans: the products of
// an affine chain with a few rows at a time (the ends of a straight path,
// one weighted sum of gradients pulled back), where a general GEMM spends
// most of its time on blocking and, in gonum's, on goroutines.
//
// It is laid out like package f32: every kernel is an exported function
// with one plain-Go loop that defines it (loops.go); on amd64 without the
// purego build tag an assembly version for AVX2 and FMA runs instead when
// the CPU has them (stubs_amd64.go), and stubs_noasm.go runs the loop
// elsewhere. Both accumulate with one fused multiply-add per term (the
// loop through math.FMA, IEEE 754 fusedMultiplyAdd), in the same order, so
// they store the same bits, and the loop is the oracle the tests check the
// assembly against.
package f64
