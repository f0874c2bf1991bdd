package vae

import (
	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas32"
	"gonum.org/v1/gonum/blas/blas64"
)

// gemm32 and gemm64 are the only places the lean inference path multiplies
// matrices: c = a b + c for row-major a (m, k) with leading dimension lda,
// b (k, n) and c (m, n). They go through gonum's blas32 and blas64, so a
// faster engine installed there (blas32.Use, blas64.Use) is picked up, or
// can be called here directly instead.
func gemm32(m, n, k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int) {
	blas32.Implementation().Sgemm(blas.NoTrans, blas.NoTrans, m, n, k, 1, a, lda, b, ldb, 1, c, ldc)
}

func gemm64(m, n, k int, a []float64, lda int, b []float64, ldb int, c []float64, ldc int) {
	blas64.Implementation().Dgemm(blas.NoTrans, blas.NoTrans, m, n, k, 1, a, lda, b, ldb, 1, c, ldc)
}
