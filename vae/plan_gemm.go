package vae

import (
	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas32"
	"gonum.org/v1/gonum/blas/blas64"
)

// gemm32 and gemm64 are the only places the lean inference path multiplies
// matrices: c = op(a) b + c, row-major, with op(a) = a (m, k) or, with
// transA, the transpose of a stored as (k, m); b is (k, n) and c (m, n).
// They go through gonum's blas32 and blas64, so a faster engine installed
// there (blas32.Use, blas64.Use) is picked up; to call another engine
// directly, change these two functions.
func gemm32(transA bool, m, n, k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int) {
	blas32.Implementation().Sgemm(trans(transA), blas.NoTrans, m, n, k, 1, a, lda, b, ldb, 1, c, ldc)
}

func gemm64(transA bool, m, n, k int, a []float64, lda int, b []float64, ldb int, c []float64, ldc int) {
	blas64.Implementation().Dgemm(trans(transA), blas.NoTrans, m, n, k, 1, a, lda, b, ldb, 1, c, ldc)
}

func trans(t bool) blas.Transpose {
	if t {
		return blas.Trans
	}
	return blas.NoTrans
}
