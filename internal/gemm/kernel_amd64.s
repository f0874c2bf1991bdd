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
// Register use, AVX-512 kernels: Z0-Z23 accumulators (row r in Z(2r),
// Z(2r+1)), Z24-Z25 the row of B, Z26-Z27 broadcasts of A, then alpha and
// beta. AVX2 kernels: Y0-Y11 accumulators (row r in Y(2r), Y(2r+1)),
// Y12-Y13 the row of B, Y14-Y15 broadcasts, then alpha and beta.
// SI walks packed A, DI packed B, DX the rows of C, R8 is ldc in bytes,
// CX counts the steps left.

// ---------------------------------------------------------------------------
// AVX-512, float32, 12×32 tile (two 16-lane vectors per row).

// One row of one step: broadcast A[r] (at byte offset off) into t and
// accumulate t×B into the row's two accumulators.
#define ROW_Z_PS(off, t, c0, c1) \
	VBROADCASTSS off(SI), t; \
	VFMADD231PS  Z24, t, c0; \
	VFMADD231PS  Z25, t, c1

// Scale one row of accumulators by alpha (in Z26).
#define ALPHA_Z_PS(c0, c1) \
	VMULPS Z26, c0, c0; \
	VMULPS Z26, c1, c1

// Add beta (in Z27) times the row of C at DX, store it, step to the next row.
#define BETA_STORE_Z_PS(c0, c1) \
	VFMADD231PS (DX), Z27, c0; \
	VFMADD231PS 64(DX), Z27, c1; \
	VMOVUPS     c0, (DX); \
	VMOVUPS     c1, 64(DX); \
	ADDQ        R8, DX

// Store one row without reading C, step to the next row.
#define STORE_Z_PS(c0, c1) \
	VMOVUPS c0, (DX); \
	VMOVUPS c1, 64(DX); \
	ADDQ    R8, DX

// func sgemm12x32AVX512(kc int, a, b, c *float32, ldc int, alpha, beta float32)
TEXT ·sgemm12x32AVX512(SB), NOSPLIT, $0-48
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b+16(FP), DI
	MOVQ c+24(FP), DX
	MOVQ ldc+32(FP), R8
	SHLQ $2, R8

	VPXORD Z0, Z0, Z0
	VPXORD Z1, Z1, Z1
	VPXORD Z2, Z2, Z2
	VPXORD Z3, Z3, Z3
	VPXORD Z4, Z4, Z4
	VPXORD Z5, Z5, Z5
	VPXORD Z6, Z6, Z6
	VPXORD Z7, Z7, Z7
	VPXORD Z8, Z8, Z8
	VPXORD Z9, Z9, Z9
	VPXORD Z10, Z10, Z10
	VPXORD Z11, Z11, Z11
	VPXORD Z12, Z12, Z12
	VPXORD Z13, Z13, Z13
	VPXORD Z14, Z14, Z14
	VPXORD Z15, Z15, Z15
	VPXORD Z16, Z16, Z16
	VPXORD Z17, Z17, Z17
	VPXORD Z18, Z18, Z18
	VPXORD Z19, Z19, Z19
	VPXORD Z20, Z20, Z20
	VPXORD Z21, Z21, Z21
	VPXORD Z22, Z22, Z22
	VPXORD Z23, Z23, Z23

s12x32loop:
	VMOVUPS (DI), Z24
	VMOVUPS 64(DI), Z25
	ROW_Z_PS(0, Z26, Z0, Z1)
	ROW_Z_PS(4, Z27, Z2, Z3)
	ROW_Z_PS(8, Z26, Z4, Z5)
	ROW_Z_PS(12, Z27, Z6, Z7)
	ROW_Z_PS(16, Z26, Z8, Z9)
	ROW_Z_PS(20, Z27, Z10, Z11)
	ROW_Z_PS(24, Z26, Z12, Z13)
	ROW_Z_PS(28, Z27, Z14, Z15)
	ROW_Z_PS(32, Z26, Z16, Z17)
	ROW_Z_PS(36, Z27, Z18, Z19)
	ROW_Z_PS(40, Z26, Z20, Z21)
	ROW_Z_PS(44, Z27, Z22, Z23)
	ADDQ $48, SI
	ADDQ $128, DI
	DECQ CX
	JNZ  s12x32loop

	VBROADCASTSS alpha+40(FP), Z26
	ALPHA_Z_PS(Z0, Z1)
	ALPHA_Z_PS(Z2, Z3)
	ALPHA_Z_PS(Z4, Z5)
	ALPHA_Z_PS(Z6, Z7)
	ALPHA_Z_PS(Z8, Z9)
	ALPHA_Z_PS(Z10, Z11)
	ALPHA_Z_PS(Z12, Z13)
	ALPHA_Z_PS(Z14, Z15)
	ALPHA_Z_PS(Z16, Z17)
	ALPHA_Z_PS(Z18, Z19)
	ALPHA_Z_PS(Z20, Z21)
	ALPHA_Z_PS(Z22, Z23)

	// beta is 0 (either sign) when its bits without the sign bit are 0.
	MOVL beta+44(FP), AX
	SHLL $1, AX
	JZ   s12x32nobeta

	VBROADCASTSS beta+44(FP), Z27
	BETA_STORE_Z_PS(Z0, Z1)
	BETA_STORE_Z_PS(Z2, Z3)
	BETA_STORE_Z_PS(Z4, Z5)
	BETA_STORE_Z_PS(Z6, Z7)
	BETA_STORE_Z_PS(Z8, Z9)
	BETA_STORE_Z_PS(Z10, Z11)
	BETA_STORE_Z_PS(Z12, Z13)
	BETA_STORE_Z_PS(Z14, Z15)
	BETA_STORE_Z_PS(Z16, Z17)
	BETA_STORE_Z_PS(Z18, Z19)
	BETA_STORE_Z_PS(Z20, Z21)
	BETA_STORE_Z_PS(Z22, Z23)
	VZEROUPPER
	RET

s12x32nobeta:
	STORE_Z_PS(Z0, Z1)
	STORE_Z_PS(Z2, Z3)
	STORE_Z_PS(Z4, Z5)
	STORE_Z_PS(Z6, Z7)
	STORE_Z_PS(Z8, Z9)
	STORE_Z_PS(Z10, Z11)
	STORE_Z_PS(Z12, Z13)
	STORE_Z_PS(Z14, Z15)
	STORE_Z_PS(Z16, Z17)
	STORE_Z_PS(Z18, Z19)
	STORE_Z_PS(Z20, Z21)
	STORE_Z_PS(Z22, Z23)
	VZEROUPPER
	RET

// ---------------------------------------------------------------------------
// AVX-512, float64, 12×16 tile (two 8-lane vectors per row). Same shape as
// the float32 kernel with 8-byte elements.

#define ROW_Z_PD(off, t, c0, c1) \
	VBROADCASTSD off(SI), t; \
	VFMADD231PD  Z24, t, c0; \
	VFMADD231PD  Z25, t, c1

#define ALPHA_Z_PD(c0, c1) \
	VMULPD Z26, c0, c0; \
	VMULPD Z26, c1, c1

#define BETA_STORE_Z_PD(c0, c1) \
	VFMADD231PD (DX), Z27, c0; \
	VFMADD231PD 64(DX), Z27, c1; \
	VMOVUPD     c0, (DX); \
	VMOVUPD     c1, 64(DX); \
	ADDQ        R8, DX

#define STORE_Z_PD(c0, c1) \
	VMOVUPD c0, (DX); \
	VMOVUPD c1, 64(DX); \
	ADDQ    R8, DX

// func dgemm12x16AVX512(kc int, a, b, c *float64, ldc int, alpha, beta float64)
TEXT ·dgemm12x16AVX512(SB), NOSPLIT, $0-56
	MOVQ kc+0(FP), CX
	MOVQ a+8(FP), SI
	MOVQ b+16(FP), DI
	MOVQ c+24(FP), DX
	MOVQ ldc+32(FP), R8
	SHLQ $3, R8

	VPXORQ Z0, Z0, Z0
	VPXORQ Z1, Z1, Z1
	VPXORQ Z2, Z2, Z2
	VPXORQ Z3, Z3, Z3
	VPXORQ Z4, Z4, Z4
	VPXORQ Z5, Z5, Z5
	VPXORQ Z6, Z6, Z6
	VPXORQ Z7, Z7, Z7
	VPXORQ Z8, Z8, Z8
	VPXORQ Z9, Z9, Z9
	VPXORQ Z10, Z10, Z10
	VPXORQ Z11, Z11, Z11
	VPXORQ Z12, Z12, Z12
	VPXORQ Z13, Z13, Z13
	VPXORQ Z14, Z14, Z14
	VPXORQ Z15, Z15, Z15
	VPXORQ Z16, Z16, Z16
	VPXORQ Z17, Z17, Z17
	VPXORQ Z18, Z18, Z18
	VPXORQ Z19, Z19, Z19
	VPXORQ Z20, Z20, Z20
	VPXORQ Z21, Z21, Z21
	VPXORQ Z22, Z22, Z22
	VPXORQ Z23, Z23, Z23

d12x16loop:
	VMOVUPD (DI), Z24
	VMOVUPD 64(DI), Z25
	ROW_Z_PD(0, Z26, Z0, Z1)
	ROW_Z_PD(8, Z27, Z2, Z3)
	ROW_Z_PD(16, Z26, Z4, Z5)
	ROW_Z_PD(24, Z27, Z6, Z7)
	ROW_Z_PD(32, Z26, Z8, Z9)
	ROW_Z_PD(40, Z27, Z10, Z11)
	ROW_Z_PD(48, Z26, Z12, Z13)
	ROW_Z_PD(56, Z27, Z14, Z15)
	ROW_Z_PD(64, Z26, Z16, Z17)
	ROW_Z_PD(72, Z27, Z18, Z19)
	ROW_Z_PD(80, Z26, Z20, Z21)
	ROW_Z_PD(88, Z27, Z22, Z23)
	ADDQ $96, SI
	ADDQ $128, DI
	DECQ CX
	JNZ  d12x16loop

	VBROADCASTSD alpha+40(FP), Z26
	ALPHA_Z_PD(Z0, Z1)
	ALPHA_Z_PD(Z2, Z3)
	ALPHA_Z_PD(Z4, Z5)
	ALPHA_Z_PD(Z6, Z7)
	ALPHA_Z_PD(Z8, Z9)
	ALPHA_Z_PD(Z10, Z11)
	ALPHA_Z_PD(Z12, Z13)
	ALPHA_Z_PD(Z14, Z15)
	ALPHA_Z_PD(Z16, Z17)
	ALPHA_Z_PD(Z18, Z19)
	ALPHA_Z_PD(Z20, Z21)
	ALPHA_Z_PD(Z22, Z23)

	MOVQ beta+48(FP), AX
	SHLQ $1, AX
	JZ   d12x16nobeta

	VBROADCASTSD beta+48(FP), Z27
	BETA_STORE_Z_PD(Z0, Z1)
	BETA_STORE_Z_PD(Z2, Z3)
	BETA_STORE_Z_PD(Z4, Z5)
	BETA_STORE_Z_PD(Z6, Z7)
	BETA_STORE_Z_PD(Z8, Z9)
	BETA_STORE_Z_PD(Z10, Z11)
	BETA_STORE_Z_PD(Z12, Z13)
	BETA_STORE_Z_PD(Z14, Z15)
	BETA_STORE_Z_PD(Z16, Z17)
	BETA_STORE_Z_PD(Z18, Z19)
	BETA_STORE_Z_PD(Z20, Z21)
	BETA_STORE_Z_PD(Z22, Z23)
	VZEROUPPER
	RET

d12x16nobeta:
	STORE_Z_PD(Z0, Z1)
	STORE_Z_PD(Z2, Z3)
	STORE_Z_PD(Z4, Z5)
	STORE_Z_PD(Z6, Z7)
	STORE_Z_PD(Z8, Z9)
	STORE_Z_PD(Z10, Z11)
	STORE_Z_PD(Z12, Z13)
	STORE_Z_PD(Z14, Z15)
	STORE_Z_PD(Z16, Z17)
	STORE_Z_PD(Z18, Z19)
	STORE_Z_PD(Z20, Z21)
	STORE_Z_PD(Z22, Z23)
	VZEROUPPER
	RET

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
