//go:build amd64 && !purego

#include "textflag.h"
#include "gemm_amd64.h"

// func gemm6x16Asm(kc int, a, b, c *float32, ldc int, alpha, beta float32)
//
// Computes the 6×16 tile T = Σ_p a[6p+r]·b[16p+j] over p < kc (kc ≥ 1) from
// packed panels, then stores c[r·ldc+j] = alpha·T[r][j] + beta·c[r·ldc+j];
// when beta == 0 the old contents of c are not read (BLAS semantics). Each
// element is one chain of fused multiply-adds in the order of p; the k loop
// is unrolled four times (the remainder runs one p at a time), and the
// multiplication by alpha is skipped when alpha == 1, where it is exact.
TEXT ·gemm6x16Asm(SB), NOSPLIT, $0-48
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b+16(FP), DI
	MOVQ c+24(FP), DX
	MOVQ ldc+32(FP), R8
	SHLQ $2, R8
	ZERO12
	MOVQ CX, BX
	ANDQ $3, BX
	SHRQ $2, CX
	JZ tail

loop4:
	FMA6x16(0(DI), 32(DI), 0(SI), 4(SI), 8(SI), 12(SI), 16(SI), 20(SI))
	FMA6x16(64(DI), 96(DI), 24(SI), 28(SI), 32(SI), 36(SI), 40(SI), 44(SI))
	FMA6x16(128(DI), 160(DI), 48(SI), 52(SI), 56(SI), 60(SI), 64(SI), 68(SI))
	FMA6x16(192(DI), 224(DI), 72(SI), 76(SI), 80(SI), 84(SI), 88(SI), 92(SI))
	ADDQ $96, SI
	ADDQ $256, DI
	DECQ CX
	JNZ loop4

tail:
	TESTQ BX, BX
	JZ done

loop1:
	FMA6x16(0(DI), 32(DI), 0(SI), 4(SI), 8(SI), 12(SI), 16(SI), 20(SI))
	ADDQ $24, SI
	ADDQ $64, DI
	DECQ BX
	JNZ loop1

done:
	MOVL alpha+40(FP), AX
	CMPL AX, $0x3f800000
	JEQ scaled
	VBROADCASTSS alpha+40(FP), Y14
	MUL12(Y14)

scaled:
	JBETANZ(beta+44(FP), AX, accumulate)
	STORE2(Y0, Y1)
	ADDQ R8, DX
	STORE2(Y2, Y3)
	ADDQ R8, DX
	STORE2(Y4, Y5)
	ADDQ R8, DX
	STORE2(Y6, Y7)
	ADDQ R8, DX
	STORE2(Y8, Y9)
	ADDQ R8, DX
	STORE2(Y10, Y11)
	VZEROUPPER
	RET

accumulate:
	VBROADCASTSS beta+44(FP), Y15
	ACC2(Y0, Y1)
	ADDQ R8, DX
	ACC2(Y2, Y3)
	ADDQ R8, DX
	ACC2(Y4, Y5)
	ADDQ R8, DX
	ACC2(Y6, Y7)
	ADDQ R8, DX
	ACC2(Y8, Y9)
	ADDQ R8, DX
	ACC2(Y10, Y11)
	VZEROUPPER
	RET

// func gemm6x16StridedAsm(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32)
//
// gemm6x16Asm with A read in place: element (r, p) of the 6×kc strip is
// a[r·rs + p·ps] (rs = lda, ps = 1 for op(A) = A; rs = 1, ps = lda for
// op(A) = Aᵀ), so full strips need no packing. The chain of fused
// multiply-adds per element and the epilogue are those of gemm6x16Asm, so both
// store the same bits.
TEXT ·gemm6x16StridedAsm(SB), NOSPLIT, $0-64
	STRIDEDA
	MOVQ b+32(FP), DI
	MOVQ c+40(FP), DX
	MOVQ ldc+48(FP), R8
	SHLQ $2, R8
	ZERO12
	MOVQ CX, BX
	ANDQ $3, BX
	SHRQ $2, CX
	JZ stail

sloop4:
	FMA6x16(0(DI), 32(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	FMA6x16(64(DI), 96(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	FMA6x16(128(DI), 160(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	FMA6x16(192(DI), 224(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	ADDQ $256, DI
	DECQ CX
	JNZ sloop4

stail:
	TESTQ BX, BX
	JZ sdone

sloop1:
	FMA6x16(0(DI), 32(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	ADDQ $64, DI
	DECQ BX
	JNZ sloop1

sdone:
	MOVL alpha+56(FP), AX
	CMPL AX, $0x3f800000
	JEQ sscaled
	VBROADCASTSS alpha+56(FP), Y14
	MUL12(Y14)

sscaled:
	JBETANZ(beta+60(FP), AX, saccumulate)
	STORE2(Y0, Y1)
	ADDQ R8, DX
	STORE2(Y2, Y3)
	ADDQ R8, DX
	STORE2(Y4, Y5)
	ADDQ R8, DX
	STORE2(Y6, Y7)
	ADDQ R8, DX
	STORE2(Y8, Y9)
	ADDQ R8, DX
	STORE2(Y10, Y11)
	VZEROUPPER
	RET

saccumulate:
	VBROADCASTSS beta+60(FP), Y15
	ACC2(Y0, Y1)
	ADDQ R8, DX
	ACC2(Y2, Y3)
	ADDQ R8, DX
	ACC2(Y4, Y5)
	ADDQ R8, DX
	ACC2(Y6, Y7)
	ADDQ R8, DX
	ACC2(Y8, Y9)
	ADDQ R8, DX
	ACC2(Y10, Y11)
	VZEROUPPER
	RET

// func gemm6x16EdgeAsm(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32, mr int)
//
// The bottom edge tile of gemm6x16StridedAsm: the same chains (A at a[r·rs + p·ps],
// so rs = 1, ps = 6 reads a packed strip), but only rows r < mr (1..6) of c
// are read and written, so no row below the tile is touched and the stored
// bits are those of a full tile. (Masked stores for partial columns measured
// slower than the copy through a tile, so columns stay
// whole.)
TEXT ·gemm6x16EdgeAsm(SB), NOSPLIT, $0-72
	STRIDEDA
	MOVQ b+32(FP), DI
	MOVQ c+40(FP), DX
	MOVQ ldc+48(FP), R8
	SHLQ $2, R8
	ZERO12
	MOVQ CX, BX
	ANDQ $3, BX
	SHRQ $2, CX
	JZ mtail

mloop4:
	FMA6x16(0(DI), 32(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	FMA6x16(64(DI), 96(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	FMA6x16(128(DI), 160(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	FMA6x16(192(DI), 224(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	ADDQ $256, DI
	DECQ CX
	JNZ mloop4

mtail:
	TESTQ BX, BX
	JZ mfma

mloop1:
	FMA6x16(0(DI), 32(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	ADDQ $64, DI
	DECQ BX
	JNZ mloop1

mfma:
	MOVL alpha+56(FP), AX
	CMPL AX, $0x3f800000
	JEQ mscaled
	VBROADCASTSS alpha+56(FP), Y14
	MUL12(Y14)

mscaled:
	MOVQ mr+64(FP), AX
	JBETANZ(beta+60(FP), BX, maccumulate)
	STORE2(Y0, Y1)
	CMPQ AX, $1
	JEQ mret
	ADDQ R8, DX
	STORE2(Y2, Y3)
	CMPQ AX, $2
	JEQ mret
	ADDQ R8, DX
	STORE2(Y4, Y5)
	CMPQ AX, $3
	JEQ mret
	ADDQ R8, DX
	STORE2(Y6, Y7)
	CMPQ AX, $4
	JEQ mret
	ADDQ R8, DX
	STORE2(Y8, Y9)
	CMPQ AX, $5
	JEQ mret
	ADDQ R8, DX
	STORE2(Y10, Y11)
mret:
	VZEROUPPER
	RET

maccumulate:
	VBROADCASTSS beta+60(FP), Y15
	ACC2(Y0, Y1)
	CMPQ AX, $1
	JEQ mretacc
	ADDQ R8, DX
	ACC2(Y2, Y3)
	CMPQ AX, $2
	JEQ mretacc
	ADDQ R8, DX
	ACC2(Y4, Y5)
	CMPQ AX, $3
	JEQ mretacc
	ADDQ R8, DX
	ACC2(Y6, Y7)
	CMPQ AX, $4
	JEQ mretacc
	ADDQ R8, DX
	ACC2(Y8, Y9)
	CMPQ AX, $5
	JEQ mretacc
	ADDQ R8, DX
	ACC2(Y10, Y11)
mretacc:
	VZEROUPPER
	RET

// func gemm1x32Asm(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32)
//
// Computes the 1×32 row T[j] = Σ_p a[p·inca]·b[p·ldb+j] over p < kc (kc ≥ 1)
// straight from unpacked A and B, with the same fused multiply-add chain per
// element as gemm6x16Asm, then stores c[j] = alpha·T[j] + beta·c[j]; when
// beta == 0 the old contents of c are not read.
TEXT ·gemm1x32Asm(SB), NOSPLIT, $0-56
	ROWARGS
	VXORPS Y0, Y0, Y0
	VXORPS Y1, Y1, Y1
	VXORPS Y2, Y2, Y2
	VXORPS Y3, Y3, Y3

rowloop:
	VBROADCASTSS (SI), Y4
	VMOVUPS 0(DI), Y8
	VMOVUPS 32(DI), Y9
	VMOVUPS 64(DI), Y10
	VMOVUPS 96(DI), Y11
	VFMADD231PS Y8, Y4, Y0
	VFMADD231PS Y9, Y4, Y1
	VFMADD231PS Y10, Y4, Y2
	VFMADD231PS Y11, Y4, Y3
	ADDQ R9, SI
	ADDQ R8, DI
	DECQ CX
	JNZ rowloop

	VBROADCASTSS alpha+48(FP), Y14
	VMULPS Y14, Y0, Y0
	VMULPS Y14, Y1, Y1
	VMULPS Y14, Y2, Y2
	VMULPS Y14, Y3, Y3
	JBETANZ(beta+52(FP), AX, rowaccumulate)
	VMOVUPS Y0, 0(DX)
	VMOVUPS Y1, 32(DX)
	VMOVUPS Y2, 64(DX)
	VMOVUPS Y3, 96(DX)
	VZEROUPPER
	RET

rowaccumulate:
	VBROADCASTSS beta+52(FP), Y15
	VMOVUPS 0(DX), Y8
	VFMADD231PS Y15, Y8, Y0
	VMOVUPS Y0, 0(DX)
	VMOVUPS 32(DX), Y9
	VFMADD231PS Y15, Y9, Y1
	VMOVUPS Y1, 32(DX)
	VMOVUPS 64(DX), Y10
	VFMADD231PS Y15, Y10, Y2
	VMOVUPS Y2, 64(DX)
	VMOVUPS 96(DX), Y11
	VFMADD231PS Y15, Y11, Y3
	VMOVUPS Y3, 96(DX)
	VZEROUPPER
	RET

// func transpose8x8Asm(src *float32, lds int, dst *float32, ldd int)
//
// Stores the transpose of the 8×8 block src[r·lds+c] at dst[c·ldd+r].
TEXT ·transpose8x8Asm(SB), NOSPLIT, $0-32
	MOVQ src+0(FP), SI
	MOVQ lds+8(FP), R8
	SHLQ $2, R8
	MOVQ dst+16(FP), DI
	MOVQ ldd+24(FP), R9
	SHLQ $2, R9
	VMOVUPS (SI), Y0
	ADDQ R8, SI
	VMOVUPS (SI), Y1
	ADDQ R8, SI
	VMOVUPS (SI), Y2
	ADDQ R8, SI
	VMOVUPS (SI), Y3
	ADDQ R8, SI
	VMOVUPS (SI), Y4
	ADDQ R8, SI
	VMOVUPS (SI), Y5
	ADDQ R8, SI
	VMOVUPS (SI), Y6
	ADDQ R8, SI
	VMOVUPS (SI), Y7
	VUNPCKLPS Y1, Y0, Y8
	VUNPCKHPS Y1, Y0, Y9
	VUNPCKLPS Y3, Y2, Y10
	VUNPCKHPS Y3, Y2, Y11
	VUNPCKLPS Y5, Y4, Y12
	VUNPCKHPS Y5, Y4, Y13
	VUNPCKLPS Y7, Y6, Y14
	VUNPCKHPS Y7, Y6, Y15
	VSHUFPS $0x44, Y10, Y8, Y0
	VSHUFPS $0xee, Y10, Y8, Y1
	VSHUFPS $0x44, Y11, Y9, Y2
	VSHUFPS $0xee, Y11, Y9, Y3
	VSHUFPS $0x44, Y14, Y12, Y4
	VSHUFPS $0xee, Y14, Y12, Y5
	VSHUFPS $0x44, Y15, Y13, Y6
	VSHUFPS $0xee, Y15, Y13, Y7
	VPERM2F128 $0x20, Y4, Y0, Y8
	VPERM2F128 $0x20, Y5, Y1, Y9
	VPERM2F128 $0x20, Y6, Y2, Y10
	VPERM2F128 $0x20, Y7, Y3, Y11
	VPERM2F128 $0x31, Y4, Y0, Y12
	VPERM2F128 $0x31, Y5, Y1, Y13
	VPERM2F128 $0x31, Y6, Y2, Y14
	VPERM2F128 $0x31, Y7, Y3, Y15
	VMOVUPS Y8, (DI)
	ADDQ R9, DI
	VMOVUPS Y9, (DI)
	ADDQ R9, DI
	VMOVUPS Y10, (DI)
	ADDQ R9, DI
	VMOVUPS Y11, (DI)
	ADDQ R9, DI
	VMOVUPS Y12, (DI)
	ADDQ R9, DI
	VMOVUPS Y13, (DI)
	ADDQ R9, DI
	VMOVUPS Y14, (DI)
	ADDQ R9, DI
	VMOVUPS Y15, (DI)
	VZEROUPPER
	RET

// func copyRows16Asm(src *float32, lds int, dst *float32, rows int)
//
// Copies rows (≥ 1) runs of 16 floats from src[r·lds] to dst[16r]: one
// strip of a packed B panel.
TEXT ·copyRows16Asm(SB), NOSPLIT, $0-32
	MOVQ src+0(FP), SI
	MOVQ lds+8(FP), R8
	SHLQ $2, R8
	MOVQ dst+16(FP), DI
	MOVQ rows+24(FP), CX

copyloop:
	VMOVUPS (SI), Y0
	VMOVUPS 32(SI), Y1
	VMOVUPS Y0, (DI)
	VMOVUPS Y1, 32(DI)
	ADDQ R8, SI
	ADDQ $64, DI
	DECQ CX
	JNZ copyloop
	VZEROUPPER
	RET
