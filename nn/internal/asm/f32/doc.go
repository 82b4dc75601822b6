// Package f32 holds the float32 kernels that nn's matrix products,
// convolutions, pooling and Relu run on: the 6×16 and 1×32 register tiles
// of a packed GEMM, the 6×16 and 6×32 tiles of a direct convolution, the 2×2 max pool
// and its gradient, Relu and its gradient, and the copies that pack their
// operands.
//
// Every kernel is an exported function with one plain-Go loop that defines
// it (loops.go, named like the kernel in lower case). On amd64, without the
// purego build tag, each also has an assembly version for AVX2 and FMA
// (stubs_amd64.go, named like the loop with the suffix Asm, its doc comment
// showing the loop it computes). The dispatch rule is the same for every
// kernel: the assembly runs when the CPU has AVX2 and FMA, checked once when
// the package is loaded (useAsm, reported by Asm), and the loop runs
// otherwise (stubs_noasm.go on other builds). The packed, strided and
// convolution tiles also have an AVX-512 form (suffix Avx512), which runs
// instead on a CPU with AVX-512F (useAVX512) and stores the AVX2 form's bits;
// the 6×32 convolution tile has only that form, and is two 6×16 tiles
// elsewhere. Both compute the same IEEE 754
// bits: a product accumulates as one chain of fused multiply-adds per
// element, which fma emulates exactly, so the loops are the portable kernels
// and, in the tests, the oracle the assembly is checked against bit for bit.
//
// The loops of the tile kernels run at a small fraction of the assembly's
// speed (the fused multiply-add costs about ten float64 operations in Go),
// so a caller with a faster portable algorithm for a whole product (nn's
// float32 GEMM falls back to gonum's) uses it when Asm reports false.
//
// The pointer arguments of the tile kernels are not bounds-checked: callers
// check that every element a kernel reads or writes lies inside its slice.
package f32
