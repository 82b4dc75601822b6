//go:build amd64 && !purego

#include "textflag.h"

// func accumRows32Asm(dst, x *float64, k int, b *float64, ldb int)
//
// dst[0:32] += Σ_l x[l]·b[l·ldb : l·ldb+32], l = 0..k−1 in order, on eight
// YMM accumulators, one fused multiply-add (VFMADD231PD) per row and
// element, as accumRows computes with math.FMA.
TEXT ·accumRows32Asm(SB), NOSPLIT, $0-40
	MOVQ dst+0(FP), DI
	MOVQ x+8(FP), SI
	MOVQ k+16(FP), CX
	MOVQ b+24(FP), DX
	MOVQ ldb+32(FP), R8
	SHLQ $3, R8
	VMOVUPD (DI), Y0
	VMOVUPD 32(DI), Y1
	VMOVUPD 64(DI), Y2
	VMOVUPD 96(DI), Y3
	VMOVUPD 128(DI), Y4
	VMOVUPD 160(DI), Y5
	VMOVUPD 192(DI), Y6
	VMOVUPD 224(DI), Y7

row32:
	VBROADCASTSD (SI), Y8
	VFMADD231PD (DX), Y8, Y0
	VFMADD231PD 32(DX), Y8, Y1
	VFMADD231PD 64(DX), Y8, Y2
	VFMADD231PD 96(DX), Y8, Y3
	VFMADD231PD 128(DX), Y8, Y4
	VFMADD231PD 160(DX), Y8, Y5
	VFMADD231PD 192(DX), Y8, Y6
	VFMADD231PD 224(DX), Y8, Y7
	ADDQ $8, SI
	ADDQ R8, DX
	DECQ CX
	JNZ row32

	VMOVUPD Y0, (DI)
	VMOVUPD Y1, 32(DI)
	VMOVUPD Y2, 64(DI)
	VMOVUPD Y3, 96(DI)
	VMOVUPD Y4, 128(DI)
	VMOVUPD Y5, 160(DI)
	VMOVUPD Y6, 192(DI)
	VMOVUPD Y7, 224(DI)
	VZEROUPPER
	RET

// func accumRows4Asm(dst, x *float64, k int, b *float64, ldb int)
TEXT ·accumRows4Asm(SB), NOSPLIT, $0-40
	MOVQ dst+0(FP), DI
	MOVQ x+8(FP), SI
	MOVQ k+16(FP), CX
	MOVQ b+24(FP), DX
	MOVQ ldb+32(FP), R8
	SHLQ $3, R8
	VMOVUPD (DI), Y0

row4:
	VBROADCASTSD (SI), Y8
	VFMADD231PD (DX), Y8, Y0
	ADDQ $8, SI
	ADDQ R8, DX
	DECQ CX
	JNZ row4

	VMOVUPD Y0, (DI)
	VZEROUPPER
	RET
