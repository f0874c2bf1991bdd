//go:build amd64

#include "textflag.h"

// Microkernels for the blocked products in driver.go. Each computes one
// register tile C = alpha*(A·B) + beta*C from packed strips:
//
//	a: kc groups of MR values (one column of the MR-row strip of A per step)
//	b: kc groups of NR values (one row of the NR-column strip of B per step)
//	c: the tile's top-left element; rows ldc elements apart
//
// Every step of the inner loop loads the NR values of B into vector
// registers, broadcasts each of the MR values of A in turn and multiply-adds
// the product into the accumulators of that row of the tile (the
// outer-product formulation of Goto and van de Geijn 2008). After the loop
// the accumulators are scaled by alpha and, unless beta is 0 (then C is
// never read), added to beta times C.
//
// These are the AVX2 kernels; the AVX-512 ones, for every tile height and
// with masked stores, are generated into kernel_avx512_amd64.s by
// asmgen/main.go on the same plan.
//
// Register use: Y0-Y11 accumulators (row r in Y(2r), Y(2r+1)), Y12-Y13 the
// row of B, Y14-Y15 broadcasts of A, then alpha and beta.
// SI walks packed A, DI packed B, DX the rows of C, R8 is ldc in bytes,
// CX counts the steps left.

// ---------------------------------------------------------------------------
// AVX2 + FMA, float32, 6×16 tile (two 8-lane vectors per row).

#define ROW_Y_PS(off, t, c0, c1) \
	VBROADCASTSS off(SI), t; \
	VFMADD231PS  Y12, t, c0; \
	VFMADD231PS  Y13, t, c1

#define ALPHA_Y_PS(c0, c1) \
	VMULPS Y14, c0, c0; \
	VMULPS Y14, c1, c1

#define BETA_STORE_Y_PS(c0, c1) \
	VFMADD231PS (DX), Y15, c0; \
	VFMADD231PS 32(DX), Y15, c1; \
	VMOVUPS     c0, (DX); \
	VMOVUPS     c1, 32(DX); \
	ADDQ        R8, DX

#define STORE_Y_PS(c0, c1) \
	VMOVUPS c0, (DX); \
	VMOVUPS c1, 32(DX); \
	ADDQ    R8, DX

// func sgemm6x16AVX2(kc int, a, b, c *float32, ldc int, alpha, beta float32)
TEXT ·sgemm6x16AVX2(SB), NOSPLIT, $0-48
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b+16(FP), DI
	MOVQ c+24(FP), DX
	MOVQ ldc+32(FP), R8
	SHLQ $2, R8

	VXORPS Y0, Y0, Y0
	VXORPS Y1, Y1, Y1
	VXORPS Y2, Y2, Y2
	VXORPS Y3, Y3, Y3
	VXORPS Y4, Y4, Y4
	VXORPS Y5, Y5, Y5
	VXORPS Y6, Y6, Y6
	VXORPS Y7, Y7, Y7
	VXORPS Y8, Y8, Y8
	VXORPS Y9, Y9, Y9
	VXORPS Y10, Y10, Y10
	VXORPS Y11, Y11, Y11

s6x16loop:
	VMOVUPS (DI), Y12
	VMOVUPS 32(DI), Y13
	ROW_Y_PS(0, Y14, Y0, Y1)
	ROW_Y_PS(4, Y15, Y2, Y3)
	ROW_Y_PS(8, Y14, Y4, Y5)
	ROW_Y_PS(12, Y15, Y6, Y7)
	ROW_Y_PS(16, Y14, Y8, Y9)
	ROW_Y_PS(20, Y15, Y10, Y11)
	ADDQ $24, SI
	ADDQ $64, DI
	DECQ CX
	JNZ  s6x16loop

	VBROADCASTSS alpha+40(FP), Y14
	ALPHA_Y_PS(Y0, Y1)
	ALPHA_Y_PS(Y2, Y3)
	ALPHA_Y_PS(Y4, Y5)
	ALPHA_Y_PS(Y6, Y7)
	ALPHA_Y_PS(Y8, Y9)
	ALPHA_Y_PS(Y10, Y11)

	MOVL beta+44(FP), AX
	SHLL $1, AX
	JZ   s6x16nobeta

	VBROADCASTSS beta+44(FP), Y15
	BETA_STORE_Y_PS(Y0, Y1)
	BETA_STORE_Y_PS(Y2, Y3)
	BETA_STORE_Y_PS(Y4, Y5)
	BETA_STORE_Y_PS(Y6, Y7)
	BETA_STORE_Y_PS(Y8, Y9)
	BETA_STORE_Y_PS(Y10, Y11)
	VZEROUPPER
	RET

s6x16nobeta:
	STORE_Y_PS(Y0, Y1)
	STORE_Y_PS(Y2, Y3)
	STORE_Y_PS(Y4, Y5)
	STORE_Y_PS(Y6, Y7)
	STORE_Y_PS(Y8, Y9)
	STORE_Y_PS(Y10, Y11)
	VZEROUPPER
	RET

// ---------------------------------------------------------------------------
// AVX2 + FMA, float64, 6×8 tile (two 4-lane vectors per row).

#define ROW_Y_PD(off, t, c0, c1) \
	VBROADCASTSD off(SI), t; \
	VFMADD231PD  Y12, t, c0; \
	VFMADD231PD  Y13, t, c1

#define ALPHA_Y_PD(c0, c1) \
	VMULPD Y14, c0, c0; \
	VMULPD Y14, c1, c1

#define BETA_STORE_Y_PD(c0, c1) \
	VFMADD231PD (DX), Y15, c0; \
	VFMADD231PD 32(DX), Y15, c1; \
	VMOVUPD     c0, (DX); \
	VMOVUPD     c1, 32(DX); \
	ADDQ        R8, DX

#define STORE_Y_PD(c0, c1) \
	VMOVUPD c0, (DX); \
	VMOVUPD c1, 32(DX); \
	ADDQ    R8, DX

// func dgemm6x8AVX2(kc int, a, b, c *float64, ldc int, alpha, beta float64)
TEXT ·dgemm6x8AVX2(SB), NOSPLIT, $0-56
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b+16(FP), DI
	MOVQ c+24(FP), DX
	MOVQ ldc+32(FP), R8
	SHLQ $3, R8

	VXORPD Y0, Y0, Y0
	VXORPD Y1, Y1, Y1
	VXORPD Y2, Y2, Y2
	VXORPD Y3, Y3, Y3
	VXORPD Y4, Y4, Y4
	VXORPD Y5, Y5, Y5
	VXORPD Y6, Y6, Y6
	VXORPD Y7, Y7, Y7
	VXORPD Y8, Y8, Y8
	VXORPD Y9, Y9, Y9
	VXORPD Y10, Y10, Y10
	VXORPD Y11, Y11, Y11

d6x8loop:
	VMOVUPD (DI), Y12
	VMOVUPD 32(DI), Y13
	ROW_Y_PD(0, Y14, Y0, Y1)
	ROW_Y_PD(8, Y15, Y2, Y3)
	ROW_Y_PD(16, Y14, Y4, Y5)
	ROW_Y_PD(24, Y15, Y6, Y7)
	ROW_Y_PD(32, Y14, Y8, Y9)
	ROW_Y_PD(40, Y15, Y10, Y11)
	ADDQ $48, SI
	ADDQ $64, DI
	DECQ CX
	JNZ  d6x8loop

	VBROADCASTSD alpha+40(FP), Y14
	ALPHA_Y_PD(Y0, Y1)
	ALPHA_Y_PD(Y2, Y3)
	ALPHA_Y_PD(Y4, Y5)
	ALPHA_Y_PD(Y6, Y7)
	ALPHA_Y_PD(Y8, Y9)
	ALPHA_Y_PD(Y10, Y11)

	MOVQ beta+48(FP), AX
	SHLQ $1, AX
	JZ   d6x8nobeta

	VBROADCASTSD beta+48(FP), Y15
	BETA_STORE_Y_PD(Y0, Y1)
	BETA_STORE_Y_PD(Y2, Y3)
	BETA_STORE_Y_PD(Y4, Y5)
	BETA_STORE_Y_PD(Y6, Y7)
	BETA_STORE_Y_PD(Y8, Y9)
	BETA_STORE_Y_PD(Y10, Y11)
	VZEROUPPER
	RET

d6x8nobeta:
	STORE_Y_PD(Y0, Y1)
	STORE_Y_PD(Y2, Y3)
	STORE_Y_PD(Y4, Y5)
	STORE_Y_PD(Y6, Y7)
	STORE_Y_PD(Y8, Y9)
	STORE_Y_PD(Y10, Y11)
	VZEROUPPER
	RET
