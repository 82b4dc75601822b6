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

// func lerpNarrowAsm(dst *float32, u, d *float64, a float64, n int)
//
// dst[i] = float32(u[i] + a·d[i]) for i < n, n a multiple of 8: the
// product and the sum each rounded to float64 (VMULPD, VADDPD; no fused
// multiply-add), then VCVTPD2PS, as lerpNarrow computes.
TEXT ·lerpNarrowAsm(SB), NOSPLIT, $0-40
	MOVQ dst+0(FP), DI
	MOVQ u+8(FP), SI
	MOVQ d+16(FP), DX
	VBROADCASTSD a+24(FP), Y4
	MOVQ n+32(FP), CX

lerp8:
	VMULPD (DX), Y4, Y0
	VMULPD 32(DX), Y4, Y1
	VADDPD (SI), Y0, Y0
	VADDPD 32(SI), Y1, Y1
	VCVTPD2PSY Y0, X0
	VCVTPD2PSY Y1, X1
	VMOVUPS X0, (DI)
	VMOVUPS X1, 16(DI)
	ADDQ $64, SI
	ADDQ $64, DX
	ADDQ $32, DI
	SUBQ $8, CX
	JNZ lerp8
	VZEROUPPER
	RET

// func addScaledWidenAsm(dst *float64, w float64, x *float32, n int)
//
// dst[i] += w·float64(x[i]) for i < n, n a multiple of 8: VCVTPS2PD
// (exact), then the product and the sum each rounded (VMULPD, VADDPD; no
// fused multiply-add), as addScaledWiden computes.
TEXT ·addScaledWidenAsm(SB), NOSPLIT, $0-32
	MOVQ dst+0(FP), DI
	VBROADCASTSD w+8(FP), Y4
	MOVQ x+16(FP), SI
	MOVQ n+24(FP), CX

axpy8:
	VCVTPS2PD (SI), Y0
	VCVTPS2PD 16(SI), Y1
	VMULPD Y0, Y4, Y0
	VMULPD Y1, Y4, Y1
	VADDPD (DI), Y0, Y0
	VADDPD 32(DI), Y1, Y1
	VMOVUPD Y0, (DI)
	VMOVUPD Y1, 32(DI)
	ADDQ $32, SI
	ADDQ $64, DI
	SUBQ $8, CX
	JNZ axpy8
	VZEROUPPER
	RET
