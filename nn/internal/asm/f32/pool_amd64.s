//go:build amd64 && !purego

#include "textflag.h"

// 2×2 stride-2 max pool kernels over float32 NCHW planes, 8 outputs per
// step (4 when the output row is shorter than 8). A step loads two rows of
// 16 inputs and splits each into its even (a, c) and odd (b, d) columns
// with VSHUFPS, which leaves the outputs in the order 0 1 4 5 | 2 3 6 7;
// VPERMPD $0xd8 maps between that order and the natural one (it is its own
// inverse). The window maximum is m = max(max(max(a, b), c), d) with
// VMAXPS src2 > src3 ? src2 : src3, which keeps the earlier element on
// ties and is exactly "if v > m { m = v }" of the loop in maxPool2x2 when no
// input is NaN. NaNs are only detected (VCMPPS UNORD, OR-ed into Y13/Y14):
// the functions return true and MaxPool2x2 redoes the pass with its loop.
// A row whose length is not a multiple of the step ends with one step that
// overlaps the previous one, recomputing identical values.

// MAX8 computes the maximum of 8 windows: inputs at (r0), (r1); result in
// Y4 in tile order; NaN flags OR-ed into Y13. Clobbers Y0-Y9.
#define MAX8(r0, r1) \
	VMOVUPS (r0), Y0 \
	VMOVUPS 32(r0), Y1 \
	VMOVUPS (r1), Y2 \
	VMOVUPS 32(r1), Y3 \
	VSHUFPS $0x88, Y1, Y0, Y4 \
	VSHUFPS $0xdd, Y1, Y0, Y5 \
	VSHUFPS $0x88, Y3, Y2, Y6 \
	VSHUFPS $0xdd, Y3, Y2, Y7 \
	VCMPPS $3, Y5, Y4, Y8 \
	VCMPPS $3, Y7, Y6, Y9 \
	VORPS Y8, Y13, Y13 \
	VORPS Y9, Y13, Y13 \
	VMAXPS Y4, Y5, Y4 \
	VMAXPS Y4, Y6, Y4 \
	VMAXPS Y4, Y7, Y4

// MAX4 is MAX8 for 4 windows in X registers (natural order), NaN flags in
// Y14.
#define MAX4(r0, r1) \
	VMOVUPS (r0), X0 \
	VMOVUPS 16(r0), X1 \
	VMOVUPS (r1), X2 \
	VMOVUPS 16(r1), X3 \
	VSHUFPS $0x88, X1, X0, X4 \
	VSHUFPS $0xdd, X1, X0, X5 \
	VSHUFPS $0x88, X3, X2, X6 \
	VSHUFPS $0xdd, X3, X2, X7 \
	VCMPPS $3, X5, X4, X8 \
	VCMPPS $3, X7, X6, X9 \
	VORPS X8, X14, X14 \
	VORPS X9, X14, X14 \
	VMAXPS X4, X5, X4 \
	VMAXPS X4, X6, X4 \
	VMAXPS X4, X7, X4

// func maxPool2x2Asm(x, y *float32, planes, h, w, oh, ow int) bool
//
// y[p, i, j] = first max of x[p, 2i..2i+1, 2j..2j+1] for p < planes,
// i < oh, j < ow; 4 ≤ ow, 2·ow ≤ w, 2·oh ≤ h; y is dense (planes·oh·ow).
TEXT ·maxPool2x2Asm(SB), NOSPLIT, $0-57
	MOVQ x+0(FP), SI
	MOVQ y+8(FP), DI
	MOVQ planes+16(FP), AX
	MOVQ h+24(FP), BX
	MOVQ w+32(FP), R8
	MOVQ oh+40(FP), R9
	MOVQ ow+48(FP), DX
	IMULQ R8, BX
	SHLQ $2, BX // plane stride in bytes
	SHLQ $2, R8 // row stride in bytes
	VXORPS Y13, Y13, Y13
	VXORPS Y14, Y14, Y14

fplane:
	MOVQ SI, R10
	MOVQ R9, R11

frow:
	MOVQ R10, R12
	LEAQ (R10)(R8*1), R13
	MOVQ DX, CX
	CMPQ CX, $8
	JLT  fsmall

floop:
	MAX8(R12, R13)
	VPERMPD $0xd8, Y4, Y4
	VMOVUPS Y4, (DI)
	ADDQ    $64, R12
	ADDQ    $64, R13
	ADDQ    $32, DI
	SUBQ    $8, CX
	CMPQ    CX, $8
	JGE     floop
	TESTQ   CX, CX
	JZ      frowdone

	// last 8 outputs of the row, overlapping the previous step
	NEGQ    CX
	ADDQ    $8, CX
	SHLQ    $2, CX
	SUBQ    CX, DI
	SHLQ    $1, CX
	SUBQ    CX, R12
	SUBQ    CX, R13
	MAX8(R12, R13)
	VPERMPD $0xd8, Y4, Y4
	VMOVUPS Y4, (DI)
	ADDQ    $32, DI

frowdone:
	LEAQ (R10)(R8*2), R10
	DECQ R11
	JNZ  frow
	ADDQ BX, SI
	DECQ AX
	JNZ  fplane

	VORPS  Y14, Y13, Y13
	VPTEST Y13, Y13
	SETNE  ret+56(FP)
	VZEROUPPER
	RET

fsmall: // 4 ≤ ow < 8: outputs 0-3, then ow-4 to ow-1
	MAX4(R12, R13)
	VMOVUPS X4, (DI)
	SUBQ    $4, CX
	LEAQ    (DI)(CX*4), DI
	SHLQ    $3, CX
	ADDQ    CX, R12
	ADDQ    CX, R13
	MAX4(R12, R13)
	VMOVUPS X4, (DI)
	ADDQ    $16, DI
	JMP     frowdone

// GRAD8 writes the gradient of 8 windows: inputs at (r0), (r1), output
// gradients at (dy), input gradients at off(r0), off(r1) (off a register
// holding dx − x in bytes). The winner of each window gets 0 + dy, the
// others +0: with c1 = b > a, c2 = c > max(a, b), c3 = d > max(a, b, c)
// the winner is d where c3, c where c2 ∧ ¬c3, b where c1 ∧ ¬c2 ∧ ¬c3 and a
// elsewhere. Y12 must hold zeros. VUNPCKLPS/VUNPCKHPS of the tile-ordered
// (a, b) and (c, d) gradients give the two rows in natural order.
#define GRAD8(r0, r1, dy, off) \
	VMOVUPS (r0), Y0 \
	VMOVUPS 32(r0), Y1 \
	VMOVUPS (r1), Y2 \
	VMOVUPS 32(r1), Y3 \
	VSHUFPS $0x88, Y1, Y0, Y4 \
	VSHUFPS $0xdd, Y1, Y0, Y5 \
	VSHUFPS $0x88, Y3, Y2, Y6 \
	VSHUFPS $0xdd, Y3, Y2, Y7 \
	VCMPPS $3, Y5, Y4, Y8 \
	VCMPPS $3, Y7, Y6, Y9 \
	VORPS Y8, Y13, Y13 \
	VORPS Y9, Y13, Y13 \
	VCMPPS $0x1e, Y4, Y5, Y8 \
	VMAXPS Y4, Y5, Y4 \
	VCMPPS $0x1e, Y4, Y6, Y9 \
	VMAXPS Y4, Y6, Y4 \
	VCMPPS $0x1e, Y4, Y7, Y10 \
	VPERMPD $0xd8, (dy), Y11 \
	VADDPS Y12, Y11, Y11 \
	VANDPS Y11, Y10, Y7 \
	VANDPS Y11, Y9, Y6 \
	VANDNPS Y6, Y10, Y6 \
	VORPS Y10, Y9, Y9 \
	VANDPS Y11, Y8, Y5 \
	VANDNPS Y5, Y9, Y5 \
	VORPS Y9, Y8, Y8 \
	VANDNPS Y11, Y8, Y4 \
	VUNPCKLPS Y5, Y4, Y0 \
	VUNPCKHPS Y5, Y4, Y1 \
	VUNPCKLPS Y7, Y6, Y2 \
	VUNPCKHPS Y7, Y6, Y3 \
	VMOVUPS Y0, (r0)(off*1) \
	VMOVUPS Y1, 32(r0)(off*1) \
	VMOVUPS Y2, (r1)(off*1) \
	VMOVUPS Y3, 32(r1)(off*1)

// GRAD4 is GRAD8 for 4 windows in X registers (natural order), NaN flags
// in Y14.
#define GRAD4(r0, r1, dy, off) \
	VMOVUPS (r0), X0 \
	VMOVUPS 16(r0), X1 \
	VMOVUPS (r1), X2 \
	VMOVUPS 16(r1), X3 \
	VSHUFPS $0x88, X1, X0, X4 \
	VSHUFPS $0xdd, X1, X0, X5 \
	VSHUFPS $0x88, X3, X2, X6 \
	VSHUFPS $0xdd, X3, X2, X7 \
	VCMPPS $3, X5, X4, X8 \
	VCMPPS $3, X7, X6, X9 \
	VORPS X8, X14, X14 \
	VORPS X9, X14, X14 \
	VCMPPS $0x1e, X4, X5, X8 \
	VMAXPS X4, X5, X4 \
	VCMPPS $0x1e, X4, X6, X9 \
	VMAXPS X4, X6, X4 \
	VCMPPS $0x1e, X4, X7, X10 \
	VMOVUPS (dy), X11 \
	VADDPS X12, X11, X11 \
	VANDPS X11, X10, X7 \
	VANDPS X11, X9, X6 \
	VANDNPS X6, X10, X6 \
	VORPS X10, X9, X9 \
	VANDPS X11, X8, X5 \
	VANDNPS X5, X9, X5 \
	VORPS X9, X8, X8 \
	VANDNPS X11, X8, X4 \
	VUNPCKLPS X5, X4, X0 \
	VUNPCKHPS X5, X4, X1 \
	VUNPCKLPS X7, X6, X2 \
	VUNPCKHPS X7, X6, X3 \
	VMOVUPS X0, (r0)(off*1) \
	VMOVUPS X1, 16(r0)(off*1) \
	VMOVUPS X2, (r1)(off*1) \
	VMOVUPS X3, 16(r1)(off*1)

// func maxPool2x2GradAsm(x, dy, dx *float32, planes, h, w, oh, ow int) bool
//
// Writes dx[p, 2i+u, 2j+v] for u, v < 2, i < oh, j < ow: 0 + dy[p, i, j]
// at the first maximum of the window, +0 elsewhere. Same conditions as
// maxPool2x2Asm; dx has the layout of x.
TEXT ·maxPool2x2GradAsm(SB), NOSPLIT, $0-65
	MOVQ x+0(FP), SI
	MOVQ dy+8(FP), DI
	MOVQ dx+16(FP), AX
	SUBQ SI, AX // dx − x in bytes
	MOVQ h+32(FP), BX
	MOVQ w+40(FP), R8
	MOVQ ow+56(FP), DX
	IMULQ R8, BX
	SHLQ $2, BX
	SHLQ $2, R8
	VXORPS Y12, Y12, Y12
	VXORPS Y13, Y13, Y13
	VXORPS Y14, Y14, Y14

bplane:
	MOVQ SI, R10
	MOVQ oh+48(FP), R11

brow:
	MOVQ R10, R12
	LEAQ (R10)(R8*1), R13
	MOVQ DX, CX
	CMPQ CX, $8
	JLT  bsmall

bloop:
	GRAD8(R12, R13, DI, AX)
	ADDQ  $64, R12
	ADDQ  $64, R13
	ADDQ  $32, DI
	SUBQ  $8, CX
	CMPQ  CX, $8
	JGE   bloop
	TESTQ CX, CX
	JZ    browdone

	NEGQ CX
	ADDQ $8, CX
	SHLQ $2, CX
	SUBQ CX, DI
	SHLQ $1, CX
	SUBQ CX, R12
	SUBQ CX, R13
	GRAD8(R12, R13, DI, AX)
	ADDQ $32, DI

browdone:
	LEAQ (R10)(R8*2), R10
	DECQ R11
	JNZ  brow
	ADDQ BX, SI
	DECQ planes+24(FP)
	JNZ  bplane

	VORPS  Y14, Y13, Y13
	VPTEST Y13, Y13
	SETNE  ret+64(FP)
	VZEROUPPER
	RET

bsmall:
	GRAD4(R12, R13, DI, AX)
	SUBQ $4, CX
	LEAQ (DI)(CX*4), DI
	SHLQ $3, CX
	ADDQ CX, R12
	ADDQ CX, R13
	GRAD4(R12, R13, DI, AX)
	ADDQ $16, DI
	JMP  browdone
