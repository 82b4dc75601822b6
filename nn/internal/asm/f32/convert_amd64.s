//go:build amd64 && !purego

#include "textflag.h"

// func widenAsm(dst *float64, src *float32, n int)
//
// dst[i] = float64(src[i]) for i < n, n a multiple of 8: VCVTPS2PD, exact.
TEXT ·widenAsm(SB), NOSPLIT, $0-24
	MOVQ dst+0(FP), DI
	MOVQ src+8(FP), SI
	MOVQ n+16(FP), CX

widen8:
	VCVTPS2PD (SI), Y0
	VCVTPS2PD 16(SI), Y1
	VMOVUPD Y0, (DI)
	VMOVUPD Y1, 32(DI)
	ADDQ $32, SI
	ADDQ $64, DI
	SUBQ $8, CX
	JNZ widen8
	VZEROUPPER
	RET

// func narrowAsm(dst *float32, src *float64, n int)
//
// dst[i] = float32(src[i]) for i < n, n a multiple of 8: VCVTPD2PS rounds
// as MXCSR says, to nearest with ties to even (Go never changes it), the
// instruction Go's conversion compiles to.
TEXT ·narrowAsm(SB), NOSPLIT, $0-24
	MOVQ dst+0(FP), DI
	MOVQ src+8(FP), SI
	MOVQ n+16(FP), CX

narrow8:
	VCVTPD2PSY (SI), X0
	VCVTPD2PSY 32(SI), X1
	VMOVUPS X0, (DI)
	VMOVUPS X1, 16(DI)
	ADDQ $64, SI
	ADDQ $32, DI
	SUBQ $8, CX
	JNZ narrow8
	VZEROUPPER
	RET
