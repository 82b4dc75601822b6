//go:build amd64 && !purego

#include "textflag.h"
#include "gemm_amd64.h"

// func conv6x16Asm(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32)
//
// gemm6x16Asm (gemm_amd64.s) with the B panel read in place: row p of the
// 16-column strip is the 16 floats at b[off[p]] instead of a packed row, so
// the im2col strip of a convolution is read straight from the padded image.
// The multiply-adds and their order are those of gemm6x16Asm (the k loop
// unrolled four times, the remainder one p at a time). It stores
// c[r·ldc+j] = T[r][j] + bias[r] (one rounding, like gemm6x16Asm's beta = 1
// store onto a bias-filled tile), or T[r][j] when bias is nil; c is never
// read.
TEXT ·conv6x16Asm(SB), NOSPLIT, $0-56
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b+16(FP), DI
	MOVQ off+24(FP), R9
	MOVQ c+32(FP), DX
	MOVQ ldc+40(FP), R8
	SHLQ $2, R8
	ZERO12

	MOVQ CX, BX
	ANDQ $3, BX
	SHRQ $2, CX
	JZ ktail

kloop4:
	MOVLQSX 0(R9), AX
	FMA6x16((DI)(AX*4), 32(DI)(AX*4), 0(SI), 4(SI), 8(SI), 12(SI), 16(SI), 20(SI))
	MOVLQSX 4(R9), AX
	FMA6x16((DI)(AX*4), 32(DI)(AX*4), 24(SI), 28(SI), 32(SI), 36(SI), 40(SI), 44(SI))
	MOVLQSX 8(R9), AX
	FMA6x16((DI)(AX*4), 32(DI)(AX*4), 48(SI), 52(SI), 56(SI), 60(SI), 64(SI), 68(SI))
	MOVLQSX 12(R9), AX
	FMA6x16((DI)(AX*4), 32(DI)(AX*4), 72(SI), 76(SI), 80(SI), 84(SI), 88(SI), 92(SI))
	ADDQ $96, SI
	ADDQ $16, R9
	DECQ CX
	JNZ kloop4

ktail:
	TESTQ BX, BX
	JZ kstore

kloop1:
	MOVLQSX 0(R9), AX
	FMA6x16((DI)(AX*4), 32(DI)(AX*4), 0(SI), 4(SI), 8(SI), 12(SI), 16(SI), 20(SI))
	ADDQ $24, SI
	ADDQ $4, R9
	DECQ BX
	JNZ kloop1

kstore:
	MOVQ bias+48(FP), BX
	TESTQ BX, BX
	JEQ knobias
	VBROADCASTSS 0(BX), Y14
	VADDPS Y14, Y0, Y0
	VADDPS Y14, Y1, Y1
	VBROADCASTSS 4(BX), Y14
	VADDPS Y14, Y2, Y2
	VADDPS Y14, Y3, Y3
	VBROADCASTSS 8(BX), Y14
	VADDPS Y14, Y4, Y4
	VADDPS Y14, Y5, Y5
	VBROADCASTSS 12(BX), Y14
	VADDPS Y14, Y6, Y6
	VADDPS Y14, Y7, Y7
	VBROADCASTSS 16(BX), Y14
	VADDPS Y14, Y8, Y8
	VADDPS Y14, Y9, Y9
	VBROADCASTSS 20(BX), Y14
	VADDPS Y14, Y10, Y10
	VADDPS Y14, Y11, Y11

knobias:
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

// func copyRowsAsm(dst *float32, ldd int, src *float32, lds int, rows, w int)
//
// Copies rows rows of w floats from src (row stride lds) to dst (row
// stride ldd): eight floats per YMM move, the rest one at a time.
TEXT ·copyRowsAsm(SB), NOSPLIT, $0-48
	MOVQ dst+0(FP), DI
	MOVQ ldd+8(FP), R8
	SHLQ $2, R8
	MOVQ src+16(FP), SI
	MOVQ lds+24(FP), R9
	SHLQ $2, R9
	MOVQ rows+32(FP), CX
	MOVQ w+40(FP), DX
	TESTQ CX, CX
	JEQ cdone

crow:
	MOVQ DX, BX
	XORQ AX, AX
	CMPQ BX, $8
	JLT ctail

cvec:
	VMOVUPS (SI)(AX*1), Y0
	VMOVUPS Y0, (DI)(AX*1)
	ADDQ $32, AX
	SUBQ $8, BX
	CMPQ BX, $8
	JGE cvec

ctail:
	TESTQ BX, BX
	JEQ cnext

cscal:
	MOVL (SI)(AX*1), R10
	MOVL R10, (DI)(AX*1)
	ADDQ $4, AX
	DECQ BX
	JNZ cscal

cnext:
	ADDQ R8, DI
	ADDQ R9, SI
	DECQ CX
	JNZ crow
	VZEROUPPER

cdone:
	RET
