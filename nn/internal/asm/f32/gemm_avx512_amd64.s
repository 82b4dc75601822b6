//go:build amd64 && !purego

#include "textflag.h"
#include "gemm_amd64.h"

// The AVX-512 form of the 6×16 tile: row r of the tile lives in one ZMM
// register, Z(r), a row of B in Z12, and each element of A is broadcast
// from memory into its fused multiply-add. Each element of C is the chain
// of fused multiply-adds of gemm6x16Asm, in the same order, so the two
// store the same bits.

// ZEROZ6 clears the 6×16 tile, Z0..Z5; ZEROZ12 the 6×32 tile, Z0..Z11.
#define ZEROZ6 \
	VPXORD Z0, Z0, Z0; VPXORD Z1, Z1, Z1; VPXORD Z2, Z2, Z2; \
	VPXORD Z3, Z3, Z3; VPXORD Z4, Z4, Z4; VPXORD Z5, Z5, Z5
#define ZEROZ12 \
	ZEROZ6; \
	VPXORD Z6, Z6, Z6; VPXORD Z7, Z7, Z7; VPXORD Z8, Z8, Z8; \
	VPXORD Z9, Z9, Z9; VPXORD Z10, Z10, Z10; VPXORD Z11, Z11, Z11

// FMAZ6x16 adds the outer product of one 16-float row of B and one 6-float
// column of A (a0..a5) to the tile, one fused multiply-add per element.
#define FMAZ6x16(b, a0, a1, a2, a3, a4, a5) \
	VMOVUPS b, Z12; \
	VFMADD231PS.BCST a0, Z12, Z0; VFMADD231PS.BCST a1, Z12, Z1; VFMADD231PS.BCST a2, Z12, Z2; \
	VFMADD231PS.BCST a3, Z12, Z3; VFMADD231PS.BCST a4, Z12, Z4; VFMADD231PS.BCST a5, Z12, Z5

// EPILOGUEZ scales the tile by alpha (skipped when alpha == 1) and stores
// it at DX, rows R8 bytes apart, adding beta times the old rows when beta
// is not 0, one fused multiply-add per element as ACC2 does.
#define EPILOGUEZ(alphaOff, betaOff) \
	MOVL alphaOff(FP), AX; \
	CMPL AX, $0x3f800000; \
	JEQ zscaled; \
	VBROADCASTSS alphaOff(FP), Z14; \
	VMULPS Z14, Z0, Z0; VMULPS Z14, Z1, Z1; VMULPS Z14, Z2, Z2; \
	VMULPS Z14, Z3, Z3; VMULPS Z14, Z4, Z4; VMULPS Z14, Z5, Z5; \
zscaled: \
	JBETANZ(betaOff(FP), AX, zaccumulate); \
	VMOVUPS Z0, (DX); ADDQ R8, DX; VMOVUPS Z1, (DX); ADDQ R8, DX; VMOVUPS Z2, (DX); ADDQ R8, DX; \
	VMOVUPS Z3, (DX); ADDQ R8, DX; VMOVUPS Z4, (DX); ADDQ R8, DX; VMOVUPS Z5, (DX); \
	VZEROUPPER; \
	RET; \
zaccumulate: \
	VBROADCASTSS betaOff(FP), Z15; \
	VMOVUPS (DX), Z12; VFMADD231PS Z15, Z12, Z0; VMOVUPS Z0, (DX); ADDQ R8, DX; \
	VMOVUPS (DX), Z12; VFMADD231PS Z15, Z12, Z1; VMOVUPS Z1, (DX); ADDQ R8, DX; \
	VMOVUPS (DX), Z12; VFMADD231PS Z15, Z12, Z2; VMOVUPS Z2, (DX); ADDQ R8, DX; \
	VMOVUPS (DX), Z12; VFMADD231PS Z15, Z12, Z3; VMOVUPS Z3, (DX); ADDQ R8, DX; \
	VMOVUPS (DX), Z12; VFMADD231PS Z15, Z12, Z4; VMOVUPS Z4, (DX); ADDQ R8, DX; \
	VMOVUPS (DX), Z12; VFMADD231PS Z15, Z12, Z5; VMOVUPS Z5, (DX); \
	VZEROUPPER; \
	RET

// CHAINS6X32 loads the arguments kc, a, rs, ps, b0, b1, c and ldc of a
// strided 6×32 tile kernel (A as STRIDEDA leaves it, B's halves in DI and
// R13, c in DX, ldc in bytes in R8) and runs the tile's chains into
// Z0..Z11: row p of B's halves at b0[16p] and b1[16p].
#define CHAINS6X32 \
	STRIDEDA; \
	MOVQ b0+32(FP), DI; MOVQ b1+40(FP), R13; \
	MOVQ c+48(FP), DX; MOVQ ldc+56(FP), R8; SHLQ $2, R8; \
	ZEROZ12; \
chains: \
	FMAZ6x32(0(DI), 0(R13), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1)); \
	ADDQ R12, SI; ADDQ $64, DI; ADDQ $64, R13; \
	DECQ CX; JNZ chains

// func gemm6x16Avx512(kc int, a, b, c *float32, ldc int, alpha, beta float32)
//
// gemm6x16Asm on AVX-512: the same arguments, chains and epilogue.
TEXT ·gemm6x16Avx512(SB), NOSPLIT, $0-48
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b+16(FP), DI
	MOVQ c+24(FP), DX
	MOVQ ldc+32(FP), R8
	SHLQ $2, R8
	ZEROZ6
	MOVQ CX, BX
	ANDQ $3, BX
	SHRQ $2, CX
	JZ tail

loop4:
	FMAZ6x16(0(DI), 0(SI), 4(SI), 8(SI), 12(SI), 16(SI), 20(SI))
	FMAZ6x16(64(DI), 24(SI), 28(SI), 32(SI), 36(SI), 40(SI), 44(SI))
	FMAZ6x16(128(DI), 48(SI), 52(SI), 56(SI), 60(SI), 64(SI), 68(SI))
	FMAZ6x16(192(DI), 72(SI), 76(SI), 80(SI), 84(SI), 88(SI), 92(SI))
	ADDQ $96, SI
	ADDQ $256, DI
	DECQ CX
	JNZ loop4

tail:
	TESTQ BX, BX
	JZ done

loop1:
	FMAZ6x16(0(DI), 0(SI), 4(SI), 8(SI), 12(SI), 16(SI), 20(SI))
	ADDQ $24, SI
	ADDQ $64, DI
	DECQ BX
	JNZ loop1

done:
	EPILOGUEZ(alpha+40, beta+44)

// func gemm6x16StridedAvx512(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32)
//
// gemm6x16StridedAsm on AVX-512: element (r, p) of A broadcast from
// a[r·rs + p·ps]; the same chains and epilogue as gemm6x16Avx512.
TEXT ·gemm6x16StridedAvx512(SB), NOSPLIT, $0-64
	STRIDEDA
	MOVQ b+32(FP), DI
	MOVQ c+40(FP), DX
	MOVQ ldc+48(FP), R8
	SHLQ $2, R8
	ZEROZ6
	MOVQ CX, BX
	ANDQ $3, BX
	SHRQ $2, CX
	JZ stail

sloop4:
	FMAZ6x16(0(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	FMAZ6x16(64(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	FMAZ6x16(128(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	FMAZ6x16(192(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	ADDQ $256, DI
	DECQ CX
	JNZ sloop4

stail:
	TESTQ BX, BX
	JZ sdone

sloop1:
	FMAZ6x16(0(DI), (SI), (SI)(R9*1), (SI)(R9*2), (SI)(R10*1), (SI)(R9*4), (SI)(R11*1))
	ADDQ R12, SI
	ADDQ $64, DI
	DECQ BX
	JNZ sloop1

sdone:
	EPILOGUEZ(alpha+56, beta+60)

// func conv6x16Avx512(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32)
//
// conv6x16Asm (conv_amd64.s) on AVX-512: row p of B read in place at
// b[off[p]], the chains of gemm6x16Avx512, and the same store of T + bias
// (one rounding) or T.
TEXT ·conv6x16Avx512(SB), NOSPLIT, $0-56
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b+16(FP), DI
	MOVQ off+24(FP), R9
	MOVQ c+32(FP), DX
	MOVQ ldc+40(FP), R8
	SHLQ $2, R8
	ZEROZ6
	MOVQ CX, BX
	ANDQ $3, BX
	SHRQ $2, CX
	JZ ktail

kloop4:
	MOVLQSX 0(R9), AX
	FMAZ6x16((DI)(AX*4), 0(SI), 4(SI), 8(SI), 12(SI), 16(SI), 20(SI))
	MOVLQSX 4(R9), AX
	FMAZ6x16((DI)(AX*4), 24(SI), 28(SI), 32(SI), 36(SI), 40(SI), 44(SI))
	MOVLQSX 8(R9), AX
	FMAZ6x16((DI)(AX*4), 48(SI), 52(SI), 56(SI), 60(SI), 64(SI), 68(SI))
	MOVLQSX 12(R9), AX
	FMAZ6x16((DI)(AX*4), 72(SI), 76(SI), 80(SI), 84(SI), 88(SI), 92(SI))
	ADDQ $96, SI
	ADDQ $16, R9
	DECQ CX
	JNZ kloop4

ktail:
	TESTQ BX, BX
	JZ kstore

kloop1:
	MOVLQSX 0(R9), AX
	FMAZ6x16((DI)(AX*4), 0(SI), 4(SI), 8(SI), 12(SI), 16(SI), 20(SI))
	ADDQ $24, SI
	ADDQ $4, R9
	DECQ BX
	JNZ kloop1

kstore:
	MOVQ bias+48(FP), BX
	TESTQ BX, BX
	JEQ knobias
	VADDPS.BCST 0(BX), Z0, Z0
	VADDPS.BCST 4(BX), Z1, Z1
	VADDPS.BCST 8(BX), Z2, Z2
	VADDPS.BCST 12(BX), Z3, Z3
	VADDPS.BCST 16(BX), Z4, Z4
	VADDPS.BCST 20(BX), Z5, Z5

knobias:
	VMOVUPS Z0, (DX)
	ADDQ R8, DX
	VMOVUPS Z1, (DX)
	ADDQ R8, DX
	VMOVUPS Z2, (DX)
	ADDQ R8, DX
	VMOVUPS Z3, (DX)
	ADDQ R8, DX
	VMOVUPS Z4, (DX)
	ADDQ R8, DX
	VMOVUPS Z5, (DX)
	VZEROUPPER
	RET

// The 6×32 convolution tile: row r of the tile lives in Z(2r) (columns
// 0..15, from b0) and Z(2r+1) (columns 16..31, from b1), twelve independent
// chains; the two halves of a row of B in Z12, Z13; each element of A is
// broadcast once into Z14 or Z15 and used by two fused multiply-adds. Each
// element is the chain of conv6x16Avx512, in the same order.

// BIASZ32 adds bias[off/4] (BX points at the bias), broadcast in tmp, to
// the tile row r0, r1; STOREZ32 stores the row at DX.
#define BIASZ32(off, tmp, r0, r1) \
	VBROADCASTSS off(BX), tmp; VADDPS tmp, r0, r0; VADDPS tmp, r1, r1
#define STOREZ32(r0, r1) \
	VMOVUPS r0, (DX); VMOVUPS r1, 64(DX)

// BIAS4Z32 adds the bias to rows 0..3 of a 32-wide tile (Z0..Z7), through
// the temporaries t0, t1; STORE4Z32 stores those rows from DX on, leaving
// DX at row 3.
#define BIAS4Z32(t0, t1) \
	BIASZ32(0, t0, Z0, Z1); BIASZ32(4, t1, Z2, Z3); BIASZ32(8, t0, Z4, Z5); BIASZ32(12, t1, Z6, Z7)
#define STORE4Z32 \
	STOREZ32(Z0, Z1); ADDQ R8, DX; STOREZ32(Z2, Z3); ADDQ R8, DX; \
	STOREZ32(Z4, Z5); ADDQ R8, DX; STOREZ32(Z6, Z7)

// STORE6Z32 stores the six rows of the 6×32 tile, Z0..Z11.
#define STORE6Z32 \
	STORE4Z32; ADDQ R8, DX; STOREZ32(Z8, Z9); ADDQ R8, DX; STOREZ32(Z10, Z11)

// FMAZ6x32 adds the outer product of one row of B (halves at bl and bh)
// and one 6-float column of A (a0..a5) to the 6×32 tile.
#define FMAZ6x32(bl, bh, a0, a1, a2, a3, a4, a5) \
	VMOVUPS bl, Z12; VMOVUPS bh, Z13; \
	VBROADCASTSS a0, Z14; VFMADD231PS Z12, Z14, Z0; VFMADD231PS Z13, Z14, Z1; \
	VBROADCASTSS a1, Z15; VFMADD231PS Z12, Z15, Z2; VFMADD231PS Z13, Z15, Z3; \
	VBROADCASTSS a2, Z14; VFMADD231PS Z12, Z14, Z4; VFMADD231PS Z13, Z14, Z5; \
	VBROADCASTSS a3, Z15; VFMADD231PS Z12, Z15, Z6; VFMADD231PS Z13, Z15, Z7; \
	VBROADCASTSS a4, Z14; VFMADD231PS Z12, Z14, Z8; VFMADD231PS Z13, Z14, Z9; \
	VBROADCASTSS a5, Z15; VFMADD231PS Z12, Z15, Z10; VFMADD231PS Z13, Z15, Z11

// func conv6x32Avx512(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32)
//
// Row p of B is read in place: its left half at b0[off[p]], its right half
// at b1[off[p]]. It stores c[r·ldc+j], j < 32, = T[r][j] + bias[r] (one
// rounding) or T[r][j] when bias is nil, as conv6x16Avx512 does; c is
// never read.
TEXT ·conv6x32Avx512(SB), NOSPLIT, $0-64
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b0+16(FP), DI
	MOVQ b1+24(FP), R10
	MOVQ off+32(FP), R9
	MOVQ c+40(FP), DX
	MOVQ ldc+48(FP), R8
	SHLQ $2, R8
	ZEROZ12
	MOVQ CX, BX
	ANDQ $3, BX
	SHRQ $2, CX
	JZ wtail

wloop4:
	MOVLQSX 0(R9), AX
	FMAZ6x32((DI)(AX*4), (R10)(AX*4), 0(SI), 4(SI), 8(SI), 12(SI), 16(SI), 20(SI))
	MOVLQSX 4(R9), AX
	FMAZ6x32((DI)(AX*4), (R10)(AX*4), 24(SI), 28(SI), 32(SI), 36(SI), 40(SI), 44(SI))
	MOVLQSX 8(R9), AX
	FMAZ6x32((DI)(AX*4), (R10)(AX*4), 48(SI), 52(SI), 56(SI), 60(SI), 64(SI), 68(SI))
	MOVLQSX 12(R9), AX
	FMAZ6x32((DI)(AX*4), (R10)(AX*4), 72(SI), 76(SI), 80(SI), 84(SI), 88(SI), 92(SI))
	ADDQ $96, SI
	ADDQ $16, R9
	DECQ CX
	JNZ wloop4

wtail:
	TESTQ BX, BX
	JZ wstore

wloop1:
	MOVLQSX 0(R9), AX
	FMAZ6x32((DI)(AX*4), (R10)(AX*4), 0(SI), 4(SI), 8(SI), 12(SI), 16(SI), 20(SI))
	ADDQ $24, SI
	ADDQ $4, R9
	DECQ BX
	JNZ wloop1

wstore:
	MOVQ bias+56(FP), BX
	TESTQ BX, BX
	JEQ wnobias
	BIAS4Z32(Z14, Z15)
	BIASZ32(16, Z14, Z8, Z9)
	BIASZ32(20, Z15, Z10, Z11)

wnobias:
	STORE6Z32
	VZEROUPPER
	RET

// FMAZ4x32 is FMAZ6x32 for rows 0..3 of the tile (a0..a3).
#define FMAZ4x32(bl, bh, a0, a1, a2, a3) \
	VMOVUPS bl, Z12; VMOVUPS bh, Z13; \
	VBROADCASTSS a0, Z14; VFMADD231PS Z12, Z14, Z0; VFMADD231PS Z13, Z14, Z1; \
	VBROADCASTSS a1, Z15; VFMADD231PS Z12, Z15, Z2; VFMADD231PS Z13, Z15, Z3; \
	VBROADCASTSS a2, Z14; VFMADD231PS Z12, Z14, Z4; VFMADD231PS Z13, Z14, Z5; \
	VBROADCASTSS a3, Z15; VFMADD231PS Z12, Z15, Z6; VFMADD231PS Z13, Z15, Z7

// func conv4x32Avx512(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32)
//
// conv6x32Avx512 for rows 0..3: the same reads of B, A's columns still six
// floats apart, the same chains and store.
TEXT ·conv4x32Avx512(SB), NOSPLIT, $0-64
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b0+16(FP), DI
	MOVQ b1+24(FP), R10
	MOVQ off+32(FP), R9
	MOVQ c+40(FP), DX
	MOVQ ldc+48(FP), R8
	SHLQ $2, R8
	ZEROZ6
	VPXORD Z6, Z6, Z6
	VPXORD Z7, Z7, Z7
	MOVQ CX, BX
	ANDQ $3, BX
	SHRQ $2, CX
	JZ qtail

qloop4:
	MOVLQSX 0(R9), AX
	FMAZ4x32((DI)(AX*4), (R10)(AX*4), 0(SI), 4(SI), 8(SI), 12(SI))
	MOVLQSX 4(R9), AX
	FMAZ4x32((DI)(AX*4), (R10)(AX*4), 24(SI), 28(SI), 32(SI), 36(SI))
	MOVLQSX 8(R9), AX
	FMAZ4x32((DI)(AX*4), (R10)(AX*4), 48(SI), 52(SI), 56(SI), 60(SI))
	MOVLQSX 12(R9), AX
	FMAZ4x32((DI)(AX*4), (R10)(AX*4), 72(SI), 76(SI), 80(SI), 84(SI))
	ADDQ $96, SI
	ADDQ $16, R9
	DECQ CX
	JNZ qloop4

qtail:
	TESTQ BX, BX
	JZ qstore

qloop1:
	MOVLQSX 0(R9), AX
	FMAZ4x32((DI)(AX*4), (R10)(AX*4), 0(SI), 4(SI), 8(SI), 12(SI))
	ADDQ $24, SI
	ADDQ $4, R9
	DECQ BX
	JNZ qloop1

qstore:
	MOVQ bias+56(FP), BX
	TESTQ BX, BX
	JEQ qnobias
	BIAS4Z32(Z14, Z15)

qnobias:
	STORE4Z32
	VZEROUPPER
	RET

// FMAZ8x32 adds the outer product of one row of B (halves at bl and bh)
// and two 4-float columns of A (a0..a3 and e0..e3) to the 8×32 tile in
// Z0..Z15, B in Z16, Z17 and A broadcast into Z18, Z19.
#define FMAZ8x32(bl, bh, a0, a1, a2, a3, e0, e1, e2, e3) \
	VMOVUPS bl, Z16; VMOVUPS bh, Z17; \
	VBROADCASTSS a0, Z18; VFMADD231PS Z16, Z18, Z0; VFMADD231PS Z17, Z18, Z1; \
	VBROADCASTSS a1, Z19; VFMADD231PS Z16, Z19, Z2; VFMADD231PS Z17, Z19, Z3; \
	VBROADCASTSS a2, Z18; VFMADD231PS Z16, Z18, Z4; VFMADD231PS Z17, Z18, Z5; \
	VBROADCASTSS a3, Z19; VFMADD231PS Z16, Z19, Z6; VFMADD231PS Z17, Z19, Z7; \
	VBROADCASTSS e0, Z18; VFMADD231PS Z16, Z18, Z8; VFMADD231PS Z17, Z18, Z9; \
	VBROADCASTSS e1, Z19; VFMADD231PS Z16, Z19, Z10; VFMADD231PS Z17, Z19, Z11; \
	VBROADCASTSS e2, Z18; VFMADD231PS Z16, Z18, Z12; VFMADD231PS Z17, Z18, Z13; \
	VBROADCASTSS e3, Z19; VFMADD231PS Z16, Z19, Z14; VFMADD231PS Z17, Z19, Z15

// func conv8x32Avx512(kc int, a0, a1, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32)
//
// conv4x32Avx512 for A at a0 (rows 0..3) and at a1 (rows 4..7) together:
// the same reads of B, the same chains and store, bias[0..7].
TEXT ·conv8x32Avx512(SB), NOSPLIT, $0-72
	MOVQ kc+0(FP), CX
	MOVQ a0+8(FP), SI
	MOVQ a1+16(FP), R11
	MOVQ b0+24(FP), DI
	MOVQ b1+32(FP), R10
	MOVQ off+40(FP), R9
	MOVQ c+48(FP), DX
	MOVQ ldc+56(FP), R8
	SHLQ $2, R8
	ZEROZ12
	VPXORD Z12, Z12, Z12
	VPXORD Z13, Z13, Z13
	VPXORD Z14, Z14, Z14
	VPXORD Z15, Z15, Z15
	MOVQ CX, BX
	ANDQ $3, BX
	SHRQ $2, CX
	JZ etail

eloop4:
	MOVLQSX 0(R9), AX
	FMAZ8x32((DI)(AX*4), (R10)(AX*4), 0(SI), 4(SI), 8(SI), 12(SI), 0(R11), 4(R11), 8(R11), 12(R11))
	MOVLQSX 4(R9), AX
	FMAZ8x32((DI)(AX*4), (R10)(AX*4), 24(SI), 28(SI), 32(SI), 36(SI), 24(R11), 28(R11), 32(R11), 36(R11))
	MOVLQSX 8(R9), AX
	FMAZ8x32((DI)(AX*4), (R10)(AX*4), 48(SI), 52(SI), 56(SI), 60(SI), 48(R11), 52(R11), 56(R11), 60(R11))
	MOVLQSX 12(R9), AX
	FMAZ8x32((DI)(AX*4), (R10)(AX*4), 72(SI), 76(SI), 80(SI), 84(SI), 72(R11), 76(R11), 80(R11), 84(R11))
	ADDQ $96, SI
	ADDQ $96, R11
	ADDQ $16, R9
	DECQ CX
	JNZ eloop4

etail:
	TESTQ BX, BX
	JZ estore

eloop1:
	MOVLQSX 0(R9), AX
	FMAZ8x32((DI)(AX*4), (R10)(AX*4), 0(SI), 4(SI), 8(SI), 12(SI), 0(R11), 4(R11), 8(R11), 12(R11))
	ADDQ $24, SI
	ADDQ $24, R11
	ADDQ $4, R9
	DECQ BX
	JNZ eloop1

estore:
	MOVQ bias+64(FP), BX
	TESTQ BX, BX
	JEQ enobias
	BIAS4Z32(Z18, Z19)
	BIASZ32(16, Z18, Z8, Z9)
	BIASZ32(20, Z19, Z10, Z11)
	BIASZ32(24, Z18, Z12, Z13)
	BIASZ32(28, Z19, Z14, Z15)

enobias:
	STORE4Z32
	ADDQ R8, DX
	STOREZ32(Z8, Z9)
	ADDQ R8, DX
	STOREZ32(Z10, Z11)
	ADDQ R8, DX
	STOREZ32(Z12, Z13)
	ADDQ R8, DX
	STOREZ32(Z14, Z15)
	VZEROUPPER
	RET

// MULZ8 scales Z0..Z7 by the broadcast scalar in z.
#define MULZ8(z) \
	VMULPS z, Z0, Z0; VMULPS z, Z1, Z1; VMULPS z, Z2, Z2; VMULPS z, Z3, Z3; \
	VMULPS z, Z4, Z4; VMULPS z, Z5, Z5; VMULPS z, Z6, Z6; VMULPS z, Z7, Z7

// STOREZ128 stores the 128-float row Z0..Z7 at DX.
#define STOREZ128 \
	VMOVUPS Z0, 0(DX); VMOVUPS Z1, 64(DX); VMOVUPS Z2, 128(DX); VMOVUPS Z3, 192(DX); \
	VMOVUPS Z4, 256(DX); VMOVUPS Z5, 320(DX); VMOVUPS Z6, 384(DX); VMOVUPS Z7, 448(DX)

// FMAZ1x128 adds a (broadcast into Z16) times 128 floats of B at b to the
// row in Z0..Z7, B read by the fused multiply-adds.
#define FMAZ1x128(b0, b1, b2, b3, b4, b5, b6, b7, a) \
	VBROADCASTSS a, Z16; \
	VFMADD231PS b0, Z16, Z0; VFMADD231PS b1, Z16, Z1; VFMADD231PS b2, Z16, Z2; VFMADD231PS b3, Z16, Z3; \
	VFMADD231PS b4, Z16, Z4; VFMADD231PS b5, Z16, Z5; VFMADD231PS b6, Z16, Z6; VFMADD231PS b7, Z16, Z7

// func conv1x128Avx512(kc int, a, b *float32, off *int32, c *float32, bias *float32)
//
// Row 0 of conv6x16Avx512 on eight strips of 16 at once: c[j], j < 128,
// the same chains and store.
TEXT ·conv1x128Avx512(SB), NOSPLIT, $0-48
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b+16(FP), DI
	MOVQ off+24(FP), R9
	MOVQ c+32(FP), DX
	ZEROZ6
	VPXORD Z6, Z6, Z6
	VPXORD Z7, Z7, Z7

oloop:
	MOVLQSX 0(R9), AX
	LEAQ (DI)(AX*4), R10
	FMAZ1x128(0(R10), 64(R10), 128(R10), 192(R10), 256(R10), 320(R10), 384(R10), 448(R10), 0(SI))
	ADDQ $24, SI
	ADDQ $4, R9
	DECQ CX
	JNZ oloop

	MOVQ bias+40(FP), BX
	TESTQ BX, BX
	JEQ onobias
	VBROADCASTSS 0(BX), Z16
	VADDPS Z16, Z0, Z0
	VADDPS Z16, Z1, Z1
	VADDPS Z16, Z2, Z2
	VADDPS Z16, Z3, Z3
	VADDPS Z16, Z4, Z4
	VADDPS Z16, Z5, Z5
	VADDPS Z16, Z6, Z6
	VADDPS Z16, Z7, Z7

onobias:
	STOREZ128
	VZEROUPPER
	RET

// ACCZ32 stores one 32-wide tile row plus beta (broadcast in Z15) times the
// row at DX: DX[j] = fma(beta, DX[j], r[j]), as EPILOGUEZ does.
#define ACCZ32(r0, r1) \
	VMOVUPS (DX), Z12; VMOVUPS 64(DX), Z13; \
	VFMADD231PS Z15, Z12, r0; VFMADD231PS Z15, Z13, r1; \
	STOREZ32(r0, r1)

// func gemm6x32StridedAvx512(kc int, a *float32, rs, ps int, b0, b1, c *float32, ldc int, alpha, beta float32)
//
// gemm6x16StridedAvx512 on the 6×32 tile of Z0..Z11 (FMAZ6x32), row p of
// B's halves at b0[16p] and b1[16p]; the epilogue of EPILOGUEZ on both
// halves of each row.
TEXT ·gemm6x32StridedAvx512(SB), NOSPLIT, $0-72
	CHAINS6X32

	MOVL alpha+64(FP), AX
	CMPL AX, $0x3f800000
	JEQ xscaled
	VBROADCASTSS alpha+64(FP), Z14
	MULZ8(Z14)
	VMULPS Z14, Z8, Z8
	VMULPS Z14, Z9, Z9
	VMULPS Z14, Z10, Z10
	VMULPS Z14, Z11, Z11

xscaled:
	JBETANZ(beta+68(FP), AX, xaccumulate)
	STORE6Z32
	VZEROUPPER
	RET

xaccumulate:
	VBROADCASTSS beta+68(FP), Z15
	ACCZ32(Z0, Z1)
	ADDQ R8, DX
	ACCZ32(Z2, Z3)
	ADDQ R8, DX
	ACCZ32(Z4, Z5)
	ADDQ R8, DX
	ACCZ32(Z6, Z7)
	ADDQ R8, DX
	ACCZ32(Z8, Z9)
	ADDQ R8, DX
	ACCZ32(Z10, Z11)
	VZEROUPPER
	RET

// BIASROWZ32 adds the bias row (Z12, Z13) to the tile row r0, r1;
// RELUZ32 applies max(·, 0) to it as reluAsm does (Z14 = +0).
#define BIASROWZ32(r0, r1) \
	VADDPS Z12, r0, r0; VADDPS Z13, r1, r1
#define RELUZ32(r0, r1) \
	VMAXPS r0, Z14, r0; VADDPS Z14, r0, r0; VMAXPS r1, Z14, r1; VADDPS Z14, r1, r1

// func gemm6x32BiasAvx512(kc int, a *float32, rs, ps int, b0, b1, c *float32, ldc int, bias *float32, relu bool)
//
// The chains of gemm6x32StridedAvx512; it stores c[r·ldc+j] = T[r][j] +
// bias[j] (one rounding, the bits of the fused multiply-add 1·bias[j] +
// T[r][j] that beta = 1 on a C holding the bias rounds to), T[r][j] when
// bias is nil, then max(·, 0) as reluAsm when relu; c is never read.
TEXT ·gemm6x32BiasAvx512(SB), NOSPLIT, $0-73
	CHAINS6X32

	MOVQ bias+64(FP), BX
	TESTQ BX, BX
	JZ bnobias
	VMOVUPS (BX), Z12
	VMOVUPS 64(BX), Z13
	BIASROWZ32(Z0, Z1)
	BIASROWZ32(Z2, Z3)
	BIASROWZ32(Z4, Z5)
	BIASROWZ32(Z6, Z7)
	BIASROWZ32(Z8, Z9)
	BIASROWZ32(Z10, Z11)

bnobias:
	MOVBQZX relu+72(FP), AX
	TESTQ AX, AX
	JZ bstore
	VPXORD Z14, Z14, Z14
	RELUZ32(Z0, Z1)
	RELUZ32(Z2, Z3)
	RELUZ32(Z4, Z5)
	RELUZ32(Z6, Z7)
	RELUZ32(Z8, Z9)
	RELUZ32(Z10, Z11)

bstore:
	STORE6Z32
	VZEROUPPER
	RET

// ROWACCZ adds beta (Z15) times the 16 floats at off(DX) to r and stores it
// there, one fused multiply-add per element, as gemm1x32Asm's epilogue.
#define ROWACCZ(off, r) \
	VMOVUPS off(DX), Z12; VFMADD231PS Z15, Z12, r; VMOVUPS r, off(DX)

// func gemm1x128Avx512(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32)
//
// gemm1x32Asm on four blocks of 32 columns at once: c[j], j < 128, the same
// chains (eight independent ones, where gemm1x32Asm's four wait on the
// fused multiply-add's latency) and the same epilogue.
TEXT ·gemm1x128Avx512(SB), NOSPLIT, $0-56
	ROWARGS
	ZEROZ6
	VPXORD Z6, Z6, Z6
	VPXORD Z7, Z7, Z7

r128loop:
	FMAZ1x128(0(DI), 64(DI), 128(DI), 192(DI), 256(DI), 320(DI), 384(DI), 448(DI), (SI))
	ADDQ R9, SI
	ADDQ R8, DI
	DECQ CX
	JNZ r128loop

	VBROADCASTSS alpha+48(FP), Z14
	MULZ8(Z14)
	JBETANZ(beta+52(FP), AX, r128accumulate)
	STOREZ128
	VZEROUPPER
	RET

r128accumulate:
	VBROADCASTSS beta+52(FP), Z15
	ROWACCZ(0, Z0)
	ROWACCZ(64, Z1)
	ROWACCZ(128, Z2)
	ROWACCZ(192, Z3)
	ROWACCZ(256, Z4)
	ROWACCZ(320, Z5)
	ROWACCZ(384, Z6)
	ROWACCZ(448, Z7)
	VZEROUPPER
	RET
