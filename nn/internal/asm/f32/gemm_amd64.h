// Register blocks shared by the 6×16 float32 kernels (gemm_amd64.s,
// conv_amd64.s): the tile of C lives in Y0..Y11 (row r in Y(2r), Y(2r+1)),
// Y12/Y13 hold a row of B, Y14/Y15 broadcast elements of A.

// ZERO12 clears the 6×16 accumulator tile.
#define ZERO12 \
	VXORPS Y0, Y0, Y0; VXORPS Y1, Y1, Y1; VXORPS Y2, Y2, Y2; VXORPS Y3, Y3, Y3; \
	VXORPS Y4, Y4, Y4; VXORPS Y5, Y5, Y5; VXORPS Y6, Y6, Y6; VXORPS Y7, Y7, Y7; \
	VXORPS Y8, Y8, Y8; VXORPS Y9, Y9, Y9; VXORPS Y10, Y10, Y10; VXORPS Y11, Y11, Y11

// FMA6x16 adds the outer product of one 16-float row of B (b0, b1: its two
// halves) and one 6-float column of A (a0..a5) to the tile, one fused
// multiply-add per element, rows in order.
#define FMA6x16(b0, b1, a0, a1, a2, a3, a4, a5) \
	VMOVUPS b0, Y12; VMOVUPS b1, Y13; \
	VBROADCASTSS a0, Y14; VFMADD231PS Y12, Y14, Y0; VFMADD231PS Y13, Y14, Y1; \
	VBROADCASTSS a1, Y15; VFMADD231PS Y12, Y15, Y2; VFMADD231PS Y13, Y15, Y3; \
	VBROADCASTSS a2, Y14; VFMADD231PS Y12, Y14, Y4; VFMADD231PS Y13, Y14, Y5; \
	VBROADCASTSS a3, Y15; VFMADD231PS Y12, Y15, Y6; VFMADD231PS Y13, Y15, Y7; \
	VBROADCASTSS a4, Y14; VFMADD231PS Y12, Y14, Y8; VFMADD231PS Y13, Y14, Y9; \
	VBROADCASTSS a5, Y15; VFMADD231PS Y12, Y15, Y10; VFMADD231PS Y13, Y15, Y11

// MUL12 scales the tile by the broadcast scalar in s.
#define MUL12(s) \
	VMULPS s, Y0, Y0; VMULPS s, Y1, Y1; VMULPS s, Y2, Y2; VMULPS s, Y3, Y3; \
	VMULPS s, Y4, Y4; VMULPS s, Y5, Y5; VMULPS s, Y6, Y6; VMULPS s, Y7, Y7; \
	VMULPS s, Y8, Y8; VMULPS s, Y9, Y9; VMULPS s, Y10, Y10; VMULPS s, Y11, Y11

// STORE2 stores one tile row (r0, r1) at DX.
#define STORE2(r0, r1) \
	VMOVUPS r0, (DX); VMOVUPS r1, 32(DX)

// ACC2 stores one tile row plus beta (broadcast in Y15) times the row at DX:
// DX[j] = fma(beta, DX[j], r[j]).
#define ACC2(r0, r1) \
	VMOVUPS (DX), Y12; VMOVUPS 32(DX), Y13; \
	VFMADD231PS Y15, Y12, r0; VFMADD231PS Y15, Y13, r1; \
	VMOVUPS r0, (DX); VMOVUPS r1, 32(DX)

// STRIDEDA loads the arguments kc (CX) and a (SI) of a strided tile kernel
// and its strides in bytes: rs in R9 (3·rs in R10, 5·rs in R11), ps in R12,
// so that element (r, p) of A is at SI + r·R9 (R10, R11 for r = 3, 5).
#define STRIDEDA \
	MOVQ kc+0(FP), CX; MOVQ a+8(FP), SI; \
	MOVQ rs+16(FP), R9; SHLQ $2, R9; LEAQ (R9)(R9*2), R10; LEAQ (R9)(R9*4), R11; \
	MOVQ ps+24(FP), R12; SHLQ $2, R12

// JBETANZ jumps to label unless beta, the float32 argument at off(FP), is
// +0 or -0 (NaN jumps too), testing its bits in reg. Integer instructions on
// purpose: a legacy (non-VEX) SSE instruction such as MOVSS or UCOMISS
// after 256- or 512-bit code, upper register halves dirty, slowed every
// kernel that had one in its epilogue. Measured on an Intel Xeon with
// AVX-512, one thread (BenchmarkGemm6x32Strided, kc = 30/64/100/256 on
// packed A): the 6×32 tile went from 36/64/79/81 to 99/109/124/109
// GFLOP/s, the AVX2 6×16 tile at kc = 256 from 53 to 68.
#define JBETANZ(off, reg, label) \
	MOVL off, reg; ANDL $0x7fffffff, reg; JNZ label

// ROWARGS loads the arguments of a row kernel (kc, a, inca, b, ldb, c):
// kc in CX, a in SI, inca in bytes in R9, b in DI, ldb in bytes in R8, c
// in DX.
#define ROWARGS \
	MOVQ kc+0(FP), CX; MOVQ a+8(FP), SI; MOVQ inca+16(FP), R9; SHLQ $2, R9; \
	MOVQ b+24(FP), DI; MOVQ ldb+32(FP), R8; SHLQ $2, R8; MOVQ c+40(FP), DX
