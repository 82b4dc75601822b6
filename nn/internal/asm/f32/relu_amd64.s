//go:build amd64 && !purego

#include "textflag.h"

// func reluAsm(y, x *float32, n int)
//
// y[i] = max(0, x[i]) for i < n, n a multiple of 8, with Go's max semantics:
// VMAXPS returns its second source when the first is not greater, so
// MAX(0, x) is x for NaN and for ±0, and adding +0 turns -0 into +0 while
// leaving every other value (NaN included) unchanged.
TEXT ·reluAsm(SB), NOSPLIT, $0-24
	MOVQ y+0(FP), DI
	MOVQ x+8(FP), SI
	MOVQ n+16(FP), CX
	VXORPS Y0, Y0, Y0

relu32:
	CMPQ CX, $32
	JLT  relu8
	VMOVUPS (SI), Y1
	VMOVUPS 32(SI), Y2
	VMOVUPS 64(SI), Y3
	VMOVUPS 96(SI), Y4
	VMAXPS  Y1, Y0, Y1
	VMAXPS  Y2, Y0, Y2
	VMAXPS  Y3, Y0, Y3
	VMAXPS  Y4, Y0, Y4
	VADDPS  Y0, Y1, Y1
	VADDPS  Y0, Y2, Y2
	VADDPS  Y0, Y3, Y3
	VADDPS  Y0, Y4, Y4
	VMOVUPS Y1, (DI)
	VMOVUPS Y2, 32(DI)
	VMOVUPS Y3, 64(DI)
	VMOVUPS Y4, 96(DI)
	ADDQ    $128, SI
	ADDQ    $128, DI
	SUBQ    $32, CX
	JMP     relu32

relu8:
	CMPQ CX, $8
	JLT  reludone
	VMOVUPS (SI), Y1
	VMAXPS  Y1, Y0, Y1
	VADDPS  Y0, Y1, Y1
	VMOVUPS Y1, (DI)
	ADDQ    $32, SI
	ADDQ    $32, DI
	SUBQ    $8, CX
	JMP     relu8

reludone:
	VZEROUPPER
	RET

// func reluGradAsm(d, x, dy *float32, n int)
//
// d[i] = dy[i] where 0 < x[i] and +0 elsewhere (NaN included: the ordered
// compare LT_OQ is false), for i < n, n a multiple of 8.
TEXT ·reluGradAsm(SB), NOSPLIT, $0-32
	MOVQ d+0(FP), DI
	MOVQ x+8(FP), SI
	MOVQ dy+16(FP), DX
	MOVQ n+24(FP), CX
	VXORPS Y0, Y0, Y0

diff32:
	CMPQ CX, $32
	JLT  diff8
	VCMPPS  $0x11, (SI), Y0, Y1
	VCMPPS  $0x11, 32(SI), Y0, Y2
	VCMPPS  $0x11, 64(SI), Y0, Y3
	VCMPPS  $0x11, 96(SI), Y0, Y4
	VANDPS  (DX), Y1, Y1
	VANDPS  32(DX), Y2, Y2
	VANDPS  64(DX), Y3, Y3
	VANDPS  96(DX), Y4, Y4
	VMOVUPS Y1, (DI)
	VMOVUPS Y2, 32(DI)
	VMOVUPS Y3, 64(DI)
	VMOVUPS Y4, 96(DI)
	ADDQ    $128, SI
	ADDQ    $128, DX
	ADDQ    $128, DI
	SUBQ    $32, CX
	JMP     diff32

diff8:
	CMPQ CX, $8
	JLT  diffdone
	VCMPPS  $0x11, (SI), Y0, Y1
	VANDPS  (DX), Y1, Y1
	VMOVUPS Y1, (DI)
	ADDQ    $32, SI
	ADDQ    $32, DX
	ADDQ    $32, DI
	SUBQ    $8, CX
	JMP     diff8

diffdone:
	VZEROUPPER
	RET

// func reluGradRowsAsm(dst *float32, ldd int, x, dy *float32, lds int, rows, w int)
//
// reluGradAsm on rows runs of w floats (x and dy rows lds apart, dst rows
// ldd apart), eight at a time and the rest of each row one by one, with
// the same ordered compare.
TEXT ·reluGradRowsAsm(SB), NOSPLIT, $0-56
	MOVQ dst+0(FP), DI
	MOVQ ldd+8(FP), R8
	SHLQ $2, R8
	MOVQ x+16(FP), SI
	MOVQ dy+24(FP), DX
	MOVQ lds+32(FP), R9
	SHLQ $2, R9
	MOVQ rows+40(FP), CX
	MOVQ w+48(FP), R11
	TESTQ CX, CX
	JEQ gdone
	VXORPS Y0, Y0, Y0

grow:
	MOVQ R11, BX
	XORQ AX, AX
	CMPQ BX, $8
	JLT gtail

gvec:
	VCMPPS $0x11, (SI)(AX*1), Y0, Y1
	VANDPS (DX)(AX*1), Y1, Y1
	VMOVUPS Y1, (DI)(AX*1)
	ADDQ $32, AX
	SUBQ $8, BX
	CMPQ BX, $8
	JGE gvec

gtail:
	TESTQ BX, BX
	JEQ gnext

gscal:
	VCMPSS $0x11, (SI)(AX*1), X0, X1
	VMOVSS (DX)(AX*1), X2
	VANDPS X2, X1, X1
	VMOVSS X1, (DI)(AX*1)
	ADDQ $4, AX
	DECQ BX
	JNZ gscal

gnext:
	ADDQ R8, DI
	ADDQ R9, SI
	ADDQ R9, DX
	DECQ CX
	JNZ grow
	VZEROUPPER

gdone:
	RET
