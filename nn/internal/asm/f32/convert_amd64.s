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

// func addToAsm(dst, src *float32, n int)
//
// dst[i] += src[i] for i < n, n a multiple of 8.
TEXT ·addToAsm(SB), NOSPLIT, $0-24
	MOVQ dst+0(FP), DI
	MOVQ src+8(FP), SI
	MOVQ n+16(FP), CX

add32:
	CMPQ CX, $32
	JLT  add8
	VMOVUPS (DI), Y0
	VMOVUPS 32(DI), Y1
	VMOVUPS 64(DI), Y2
	VMOVUPS 96(DI), Y3
	VADDPS  (SI), Y0, Y0
	VADDPS  32(SI), Y1, Y1
	VADDPS  64(SI), Y2, Y2
	VADDPS  96(SI), Y3, Y3
	VMOVUPS Y0, (DI)
	VMOVUPS Y1, 32(DI)
	VMOVUPS Y2, 64(DI)
	VMOVUPS Y3, 96(DI)
	ADDQ    $128, SI
	ADDQ    $128, DI
	SUBQ    $32, CX
	JMP     add32

add8:
	CMPQ CX, $8
	JLT  adddone
	VMOVUPS (DI), Y0
	VADDPS  (SI), Y0, Y0
	VMOVUPS Y0, (DI)
	ADDQ    $32, SI
	ADDQ    $32, DI
	SUBQ    $8, CX
	JMP     add8

adddone:
	VZEROUPPER
	RET

// func lerpAsm(dst, lo, hi *float32, f float32, n int)
//
// dst[i] = lo[i] + f·(hi[i] − lo[i]) for i < n, n a multiple of 8: the
// difference, the product and the sum each rounded (VSUBPS, VMULPS,
// VADDPS; no fused multiply-add), as lerp computes.
TEXT ·lerpAsm(SB), NOSPLIT, $0-40
	MOVQ dst+0(FP), DI
	MOVQ lo+8(FP), SI
	MOVQ hi+16(FP), DX
	VBROADCASTSS f+24(FP), Y4
	MOVQ n+32(FP), CX

lerp16:
	CMPQ CX, $16
	JLT  lerp8
	VMOVUPS (SI), Y0
	VMOVUPS 32(SI), Y1
	VMOVUPS (DX), Y2
	VMOVUPS 32(DX), Y3
	VSUBPS  Y0, Y2, Y2
	VSUBPS  Y1, Y3, Y3
	VMULPS  Y4, Y2, Y2
	VMULPS  Y4, Y3, Y3
	VADDPS  Y2, Y0, Y0
	VADDPS  Y3, Y1, Y1
	VMOVUPS Y0, (DI)
	VMOVUPS Y1, 32(DI)
	ADDQ    $64, SI
	ADDQ    $64, DX
	ADDQ    $64, DI
	SUBQ    $16, CX
	JMP     lerp16

lerp8:
	CMPQ CX, $8
	JLT  lerpdone
	VMOVUPS (SI), Y0
	VMOVUPS (DX), Y2
	VSUBPS  Y0, Y2, Y2
	VMULPS  Y4, Y2, Y2
	VADDPS  Y2, Y0, Y0
	VMOVUPS Y0, (DI)
	ADDQ    $32, SI
	ADDQ    $32, DX
	ADDQ    $32, DI
	SUBQ    $8, CX
	JMP     lerp8

lerpdone:
	VZEROUPPER
	RET

// func reluGradMidAddAsm(dst, a, b, dy *float32, n int)
//
// dst[i] += dy[i] where a[i] + b[i] > 0 for i < n, n a multiple of 8: the
// ordered compare GT_OQ (0x1e) is false for NaN, and where it is false
// the blend keeps dst[i] as it was (−0 included).
TEXT ·reluGradMidAddAsm(SB), NOSPLIT, $0-40
	MOVQ dst+0(FP), DI
	MOVQ a+8(FP), SI
	MOVQ b+16(FP), DX
	MOVQ dy+24(FP), R8
	MOVQ n+32(FP), CX
	VXORPS Y7, Y7, Y7

mid16:
	CMPQ CX, $16
	JLT  mid8
	VMOVUPS (SI), Y0
	VMOVUPS 32(SI), Y1
	VADDPS  (DX), Y0, Y0
	VADDPS  32(DX), Y1, Y1
	VCMPPS  $0x1e, Y7, Y0, Y0
	VCMPPS  $0x1e, Y7, Y1, Y1
	VMOVUPS (DI), Y2
	VMOVUPS 32(DI), Y3
	VADDPS  (R8), Y2, Y4
	VADDPS  32(R8), Y3, Y5
	VBLENDVPS Y0, Y4, Y2, Y2
	VBLENDVPS Y1, Y5, Y3, Y3
	VMOVUPS Y2, (DI)
	VMOVUPS Y3, 32(DI)
	ADDQ    $64, SI
	ADDQ    $64, DX
	ADDQ    $64, R8
	ADDQ    $64, DI
	SUBQ    $16, CX
	JMP     mid16

mid8:
	CMPQ CX, $8
	JLT  middone
	VMOVUPS (SI), Y0
	VADDPS  (DX), Y0, Y0
	VCMPPS  $0x1e, Y7, Y0, Y0
	VMOVUPS (DI), Y2
	VADDPS  (R8), Y2, Y4
	VBLENDVPS Y0, Y4, Y2, Y2
	VMOVUPS Y2, (DI)
	ADDQ    $32, SI
	ADDQ    $32, DX
	ADDQ    $32, R8
	ADDQ    $32, DI
	SUBQ    $8, CX
	JMP     mid8

middone:
	VZEROUPPER
	RET
