package vae

import "lowerbound.dev/internal/gemm"

// gemm32 and gemm64 are the only places the lean inference path multiplies
// matrices: c = op(a) b + c, row-major, with op(a) = a (m, k) or, with
// transA, the transpose of a stored as (k, m); b is (k, n) and c (m, n).
//
// They always run on the SDK's engine (internal/gemm), whatever BLAS the
// graphs use (-tags openblas, or gorgonia.Use): the engine sums every
// element of c over k in the same order whatever m is, so a record's score
// is the same bits whether it is scored alone or in a batch of any size,
// which the scoring API promises. OpenBLAS does not (its m = 1 products take
// another code path), so with it the lean path would lose that promise.
func gemm32(transA bool, m, n, k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int) {
	leanEngine.Sgemm(transA, false, m, n, k, 1, a, lda, b, ldb, 1, c, ldc)
}

func gemm64(transA bool, m, n, k int, a []float64, lda int, b []float64, ldb int, c []float64, ldc int) {
	leanEngine.Dgemm(transA, false, m, n, k, 1, a, lda, b, ldb, 1, c, ldc)
}

// leanEngine is immutable and safe for concurrent use.
var leanEngine = gemm.Default()
