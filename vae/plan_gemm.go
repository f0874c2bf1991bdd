package vae

import (
	"gonum.org/v1/gonum/blas"
	G "gorgonia.org/gorgonia"
)

// gemm32 and gemm64 are the only places the lean inference path multiplies
// matrices: c = op(a) b + c, row-major, with op(a) = a (m, k) or, with
// transA, the transpose of a stored as (k, m); b is (k, n) and c (m, n).
// They go through gorgonia's current BLAS (gorgonia.WhichBLAS), the one the
// graphs and the fused layer ops use: the SDK's engine (internal/gemm) in the
// default build, OpenBLAS with -tags openblas, or whatever the user installed
// with gorgonia.Use. One choice of BLAS serves training and serving alike.
func gemm32(transA bool, m, n, k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int) {
	G.WhichBLAS().Sgemm(trans(transA), blas.NoTrans, m, n, k, 1, a, lda, b, ldb, 1, c, ldc)
}

func gemm64(transA bool, m, n, k int, a []float64, lda int, b []float64, ldb int, c []float64, ldc int) {
	G.WhichBLAS().Dgemm(trans(transA), blas.NoTrans, m, n, k, 1, a, lda, b, ldb, 1, c, ldc)
}

func trans(t bool) blas.Transpose {
	if t {
		return blas.Trans
	}
	return blas.NoTrans
}
