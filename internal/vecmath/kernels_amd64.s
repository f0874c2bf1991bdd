//go:build amd64

#include "textflag.h"

// Float32 assembly kernels (AVX2+FMA) of bernoulli.go and adam.go.

// Float32 constants of the fast Bernoulli kernels (see bernoulli.go), each
// broadcast to eight lanes where it is used.
DATA expmask<>+0(SB)/4, $0x7f800000  // float32 exponent bits, eight times
DATA expmask<>+4(SB)/4, $0x7f800000
DATA expmask<>+8(SB)/4, $0x7f800000
DATA expmask<>+12(SB)/4, $0x7f800000
DATA expmask<>+16(SB)/4, $0x7f800000
DATA expmask<>+20(SB)/4, $0x7f800000
DATA expmask<>+24(SB)/4, $0x7f800000
DATA expmask<>+28(SB)/4, $0x7f800000
GLOBL expmask<>(SB), RODATA|NOPTR, $32

DATA bconst<>+0(SB)/4, $0x80000000  // sign bit
DATA bconst<>+4(SB)/4, $0xc2ae0000  // -87
DATA bconst<>+8(SB)/4, $0x3fb8aa3b  // log2(e)
DATA bconst<>+12(SB)/4, $0x3f317200 // ln2 head
DATA bconst<>+16(SB)/4, $0x35bfbe8e // ln2 tail
DATA bconst<>+20(SB)/4, $0x39500d01 // 1/7!
DATA bconst<>+24(SB)/4, $0x3ab60b61 // 1/6!
DATA bconst<>+28(SB)/4, $0x3c088889 // 1/5!
DATA bconst<>+32(SB)/4, $0x3d2aaaab // 1/4!
DATA bconst<>+36(SB)/4, $0x3e2aaaab // 1/3!
DATA bconst<>+40(SB)/4, $0x3f000000 // 1/2
DATA bconst<>+44(SB)/4, $0x3f800000 // 1
DATA bconst<>+48(SB)/4, $0x40000000 // 2
DATA bconst<>+52(SB)/4, $0x3e3a2e8c // 2/11
DATA bconst<>+56(SB)/4, $0x3e638e39 // 2/9
DATA bconst<>+60(SB)/4, $0x3e924925 // 2/7
DATA bconst<>+64(SB)/4, $0x3ecccccd // 2/5
DATA bconst<>+68(SB)/4, $0x3f2aaaab // 2/3
GLOBL bconst<>(SB), RODATA|NOPTR, $72

// EXPNEG computes Y9 = e^Y7 for Y7 = -|l| (clobbers Y7, Y8, Y10). With
// Y7 NaN the result is NaN.
#define EXPNEG \
	VBROADCASTSS bconst<>+4(SB), Y8  \
	VMAXPS       Y7, Y8, Y7          \ // max(-87, y); NaN y passes
	VBROADCASTSS bconst<>+8(SB), Y8  \
	VMULPS       Y8, Y7, Y8          \
	VROUNDPS     $0, Y8, Y8          \ // n = round(y*log2e)
	VBROADCASTSS bconst<>+12(SB), Y10 \
	VFNMADD231PS Y10, Y8, Y7         \ // r = y - n*ln2hi
	VBROADCASTSS bconst<>+16(SB), Y10 \
	VFNMADD231PS Y10, Y8, Y7         \ // r -= n*ln2lo
	VBROADCASTSS bconst<>+20(SB), Y9 \
	VBROADCASTSS bconst<>+24(SB), Y10 \
	VFMADD213PS  Y10, Y7, Y9         \
	VBROADCASTSS bconst<>+28(SB), Y10 \
	VFMADD213PS  Y10, Y7, Y9         \
	VBROADCASTSS bconst<>+32(SB), Y10 \
	VFMADD213PS  Y10, Y7, Y9         \
	VBROADCASTSS bconst<>+36(SB), Y10 \
	VFMADD213PS  Y10, Y7, Y9         \
	VBROADCASTSS bconst<>+40(SB), Y10 \
	VFMADD213PS  Y10, Y7, Y9         \
	VBROADCASTSS bconst<>+44(SB), Y10 \
	VFMADD213PS  Y10, Y7, Y9         \
	VFMADD213PS  Y10, Y7, Y9         \ // p = e^r
	VCVTPS2DQ    Y8, Y8              \
	VPSLLD       $23, Y8, Y8         \
	VPADDD       Y10, Y8, Y8         \ // bits of 2^n
	VMULPS       Y8, Y9, Y9

// func bernoulliRowSumAVX2(x, l []float32) float64
TEXT ·bernoulliRowSumAVX2(SB), NOSPLIT, $0-56
	MOVQ   x_base+0(FP), SI
	MOVQ   l_base+24(FP), DI
	MOVQ   l_len+32(FP), CX
	SHRQ   $3, CX
	VXORPD Y0, Y0, Y0
	VXORPD Y1, Y1, Y1
	VXORPS Y15, Y15, Y15
	VBROADCASTSS bconst<>+0(SB), Y14
	TESTQ  CX, CX
	JZ     rowdone

rowloop:
	VMOVUPS (DI), Y2
	VMOVUPS (SI), Y3
	VMAXPS  Y15, Y2, Y5 // max(l, 0)
	VMULPS  Y3, Y2, Y6
	VSUBPS  Y5, Y6, Y6  // x*l - max(l, 0)
	VORPS   Y14, Y2, Y7 // -|l|
	EXPNEG               // Y9 = t = e^-|l|

	// log1p(t): f = t, k = 0 for t <= 1/2; f = (t-1)/2, k = 1 above.
	VBROADCASTSS bconst<>+40(SB), Y10
	VSUBPS       Y9, Y10, Y13       // 1/2 - t: sign set when t > 1/2
	VBROADCASTSS bconst<>+44(SB), Y11
	VSUBPS       Y11, Y9, Y11       // t - 1
	VMULPS       Y10, Y11, Y11      // (t-1)/2
	VBLENDVPS    Y13, Y11, Y9, Y9   // f
	VBROADCASTSS bconst<>+12(SB), Y11
	VBLENDVPS    Y13, Y11, Y15, Y12 // k*ln2hi
	VBROADCASTSS bconst<>+16(SB), Y11
	VBLENDVPS    Y13, Y11, Y15, Y13 // k*ln2lo
	VBROADCASTSS bconst<>+48(SB), Y10
	VADDPS       Y9, Y10, Y10       // 2 + f
	VDIVPS       Y10, Y9, Y9        // s
	VMULPS       Y9, Y9, Y7         // z
	VBROADCASTSS bconst<>+52(SB), Y8
	VBROADCASTSS bconst<>+56(SB), Y10
	VFMADD213PS  Y10, Y7, Y8
	VBROADCASTSS bconst<>+60(SB), Y10
	VFMADD213PS  Y10, Y7, Y8
	VBROADCASTSS bconst<>+64(SB), Y10
	VFMADD213PS  Y10, Y7, Y8
	VBROADCASTSS bconst<>+68(SB), Y10
	VFMADD213PS  Y10, Y7, Y8
	VBROADCASTSS bconst<>+48(SB), Y10
	VFMADD213PS  Y10, Y7, Y8        // q
	VFMADD213PS  Y13, Y9, Y8        // s*q + k*ln2lo
	VADDPS       Y12, Y8, Y8        // + k*ln2hi: the tail
	VSUBPS       Y8, Y6, Y6         // the terms

	VCVTPS2PD     X6, Y2
	VADDPD        Y2, Y0, Y0
	VEXTRACTF128  $1, Y6, X6
	VCVTPS2PD     X6, Y3
	VADDPD        Y3, Y1, Y1

	ADDQ $32, SI
	ADDQ $32, DI
	DECQ CX
	JNZ  rowloop

rowdone:
	VADDPD       Y1, Y0, Y0
	VEXTRACTF128 $1, Y0, X1
	VADDPD       X1, X0, X0
	VHADDPD      X0, X0, X0
	VZEROUPPER
	MOVSD        X0, ret+48(FP)
	RET

// func bernoulliGradRowAVX2(out, x, l []float32, scale float32)
TEXT ·bernoulliGradRowAVX2(SB), NOSPLIT, $0-76
	MOVQ out_base+0(FP), DX
	MOVQ x_base+24(FP), SI
	MOVQ l_base+48(FP), DI
	MOVQ l_len+56(FP), CX
	SHRQ $3, CX
	VBROADCASTSS scale+72(FP), Y15
	VBROADCASTSS bconst<>+0(SB), Y14
	VBROADCASTSS bconst<>+44(SB), Y13
	TESTQ CX, CX
	JZ    graddone

gradloop:
	VMOVUPS (DI), Y2
	VMOVUPS (SI), Y3
	VORPS   Y14, Y2, Y7 // -|l|
	EXPNEG               // Y9 = t = e^-|l|
	VADDPS  Y13, Y9, Y10
	VDIVPS  Y10, Y9, Y9 // s = sigmoid(-|l|)
	VSUBPS  Y13, Y3, Y4
	VADDPS  Y9, Y4, Y4  // (x - 1) + s, for l >= 0
	VSUBPS  Y9, Y3, Y5  // x - s, for l < 0
	VBLENDVPS Y2, Y5, Y4, Y4
	VMULPS  Y15, Y4, Y4
	VMOVUPS Y4, (DX)

	ADDQ $32, DX
	ADDQ $32, SI
	ADDQ $32, DI
	DECQ CX
	JNZ  gradloop

graddone:
	VZEROUPPER
	RET

// func adamAVX2(w, g, m, v, prev []float32, c *AdamCoeffs) float32
TEXT ·adamAVX2(SB), NOSPLIT, $0-132
	MOVQ w_base+0(FP), DI
	MOVQ w_len+8(FP), CX
	MOVQ g_base+24(FP), SI
	MOVQ m_base+48(FP), R8
	MOVQ v_base+72(FP), R9
	MOVQ prev_base+96(FP), R10
	MOVQ c+120(FP), AX
	SHRQ $3, CX
	VBROADCASTSS 0(AX), Y8   // B1
	VBROADCASTSS 4(AX), Y9   // OB1
	VBROADCASTSS 8(AX), Y10  // B2
	VBROADCASTSS 12(AX), Y11 // OB2
	VBROADCASTSS 16(AX), Y12 // LR
	VBROADCASTSS 20(AX), Y13 // Eps
	VBROADCASTSS 24(AX), Y14 // IC1
	VBROADCASTSS 28(AX), Y15 // IC2
	VXORPS Y0, Y0, Y0
	TESTQ CX, CX
	JZ    adamdone

adamloop:
	VMOVUPS (SI), Y1
	VMULPS  (R8), Y8, Y2
	VMULPS  Y1, Y9, Y3
	VADDPS  Y3, Y2, Y2  // m
	VPAND   expmask<>(SB), Y2, Y3
	VXORPS  Y5, Y5, Y5
	VPCMPEQD Y5, Y3, Y3 // m is zero or subnormal
	VANDNPS Y2, Y3, Y2  // then +0
	VMOVUPS Y2, (R8)
	VMULPS  (R9), Y10, Y4
	VMULPS  Y1, Y11, Y5
	VMULPS  Y1, Y5, Y5
	VADDPS  Y5, Y4, Y4  // v
	VPAND   expmask<>(SB), Y4, Y3
	VXORPS  Y5, Y5, Y5
	VPCMPEQD Y5, Y3, Y3 // v is zero or subnormal
	VANDNPS Y4, Y3, Y4  // then +0
	VMOVUPS Y4, (R9)
	VMOVUPS (DI), Y6
	VMOVUPS Y6, (R10)
	VMULPS  Y15, Y4, Y4
	VSQRTPS Y4, Y4
	VADDPS  Y13, Y4, Y4 // sqrt(v*IC2) + Eps
	VMULPS  Y14, Y2, Y2
	VMULPS  Y12, Y2, Y2 // LR*(m*IC1)
	VDIVPS  Y4, Y2, Y2
	VSUBPS  Y2, Y6, Y6
	VMOVUPS Y6, (DI)
	VSUBPS  Y6, Y6, Y7
	VADDPS  Y7, Y0, Y0

	ADDQ $32, DI
	ADDQ $32, SI
	ADDQ $32, R8
	ADDQ $32, R9
	ADDQ $32, R10
	DECQ CX
	JNZ  adamloop

adamdone:
	VEXTRACTF128 $1, Y0, X1
	VADDPS       X1, X0, X0
	VHADDPS      X0, X0, X0
	VHADDPS      X0, X0, X0
	VZEROUPPER
	MOVSS        X0, ret+128(FP)
	RET

// func tanhAVX2(y []float32)
TEXT ·tanhAVX2(SB), NOSPLIT, $0-24
	MOVQ y_base+0(FP), DI
	MOVQ y_len+8(FP), CX
	SHRQ $3, CX
	VBROADCASTSS bconst<>+0(SB), Y14  // sign bit
	VBROADCASTSS bconst<>+44(SB), Y13 // 1
	VBROADCASTSS bconst<>+48(SB), Y12 // 2
	TESTQ CX, CX
	JZ    tanhdone

tanhloop:
	VMOVUPS (DI), Y2
	VANDNPS Y2, Y14, Y3 // |x|
	VADDPS  Y3, Y3, Y3
	VXORPS  Y14, Y3, Y7 // y = -2|x|
	VBROADCASTSS bconst<>+4(SB), Y8
	VMAXPS       Y7, Y8, Y7 // max(-87, y); NaN passes
	VBROADCASTSS bconst<>+8(SB), Y8
	VMULPS       Y8, Y7, Y8
	VROUNDPS     $0, Y8, Y8 // n
	VBROADCASTSS bconst<>+12(SB), Y10
	VFNMADD231PS Y10, Y8, Y7
	VBROADCASTSS bconst<>+16(SB), Y10
	VFNMADD231PS Y10, Y8, Y7 // r
	VBROADCASTSS bconst<>+20(SB), Y9
	VBROADCASTSS bconst<>+24(SB), Y10
	VFMADD213PS  Y10, Y7, Y9
	VBROADCASTSS bconst<>+28(SB), Y10
	VFMADD213PS  Y10, Y7, Y9
	VBROADCASTSS bconst<>+32(SB), Y10
	VFMADD213PS  Y10, Y7, Y9
	VBROADCASTSS bconst<>+36(SB), Y10
	VFMADD213PS  Y10, Y7, Y9
	VBROADCASTSS bconst<>+40(SB), Y10
	VFMADD213PS  Y10, Y7, Y9
	VMULPS       Y7, Y9, Y9
	VFMADD213PS  Y7, Y7, Y9 // p = e^r - 1 = (p*r)*r + r
	VCVTPS2DQ    Y8, Y8
	VPSLLD       $23, Y8, Y8
	VPADDD       Y13, Y8, Y8 // s = 2^n (bits of 1.0 plus n<<23)
	VSUBPS       Y13, Y8, Y10 // s - 1
	VFMADD213PS  Y10, Y8, Y9  // em = s*p + (s - 1)
	VADDPS       Y12, Y9, Y10
	VDIVPS       Y10, Y9, Y9 // em/(2 + em)
	VANDNPS      Y9, Y14, Y9 // |.|
	VANDPS       Y14, Y2, Y3
	VORPS        Y3, Y9, Y9  // with x's sign
	VMOVUPS      Y9, (DI)

	ADDQ $32, DI
	DECQ CX
	JNZ  tanhloop

tanhdone:
	VZEROUPPER
	RET
