package gemm

import (
	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/gonum"
)

// defaultEngine serves BLAS values built without an Engine. It is set once
// when the package loads and never changed.
var defaultEngine = Default()

// BLAS implements gonum's blas.Float32, blas.Float64, blas.Complex64 and
// blas.Complex128 (and so gorgonia's BLAS interface): Sgemm and Dgemm run on
// an Engine, every other routine is gonum's own pure-Go one.
//
// Arguments are checked as gonum checks them, and bad ones panic with
// gonum's messages (blas routines have no error results); the vae package
// only ever passes shapes its graphs have already checked. The zero value
// uses Default().
type BLAS struct {
	gonum.Implementation
	engine *Engine
}

// NewBLAS returns a BLAS whose products run on e (nil: Default()).
func NewBLAS(e *Engine) BLAS { return BLAS{engine: e} }

// Engine returns the Engine the products run on.
func (b BLAS) Engine() *Engine {
	if b.engine == nil {
		return defaultEngine
	}
	return b.engine
}

// Sgemm computes C = alpha*op(A)*op(B) + beta*C; see gonum's
// blas.Float32.Sgemm.
func (b BLAS) Sgemm(tA, tB blas.Transpose, m, n, k int, alpha float32, a []float32, lda int, bb []float32, ldb int, beta float32, c []float32, ldc int) {
	if !valid(tA, tB, m, n, k, len(a), lda, len(bb), ldb, len(c), ldc) {
		b.Implementation.Sgemm(tA, tB, m, n, k, alpha, a, lda, bb, ldb, beta, c, ldc) // panics with gonum's message
		return
	}
	b.Engine().Sgemm(tA != blas.NoTrans, tB != blas.NoTrans, m, n, k, alpha, a, lda, bb, ldb, beta, c, ldc)
}

// Dgemm computes C = alpha*op(A)*op(B) + beta*C; see gonum's
// blas.Float64.Dgemm.
func (b BLAS) Dgemm(tA, tB blas.Transpose, m, n, k int, alpha float64, a []float64, lda int, bb []float64, ldb int, beta float64, c []float64, ldc int) {
	if !valid(tA, tB, m, n, k, len(a), lda, len(bb), ldb, len(c), ldc) {
		b.Implementation.Dgemm(tA, tB, m, n, k, alpha, a, lda, bb, ldb, beta, c, ldc) // panics with gonum's message
		return
	}
	b.Engine().Dgemm(tA != blas.NoTrans, tB != blas.NoTrans, m, n, k, alpha, a, lda, bb, ldb, beta, c, ldc)
}

// valid reports whether gonum's Sgemm/Dgemm would accept these arguments
// (the same checks, gonum v0.17 blas/gonum/dgemm.go).
func valid(tA, tB blas.Transpose, m, n, k, la, lda, lb, ldb, lc, ldc int) bool {
	okT := func(t blas.Transpose) bool { return t == blas.NoTrans || t == blas.Trans || t == blas.ConjTrans }
	if !okT(tA) || !okT(tB) || m < 0 || n < 0 || k < 0 {
		return false
	}
	aT, bT := tA != blas.NoTrans, tB != blas.NoTrans
	if (aT && lda < max(1, m)) || (!aT && lda < max(1, k)) {
		return false
	}
	if (bT && ldb < max(1, k)) || (!bT && ldb < max(1, n)) {
		return false
	}
	if ldc < max(1, n) {
		return false
	}
	if m == 0 || n == 0 {
		return true
	}
	if (aT && la < (k-1)*lda+m) || (!aT && la < (m-1)*lda+k) {
		return false
	}
	if (bT && lb < (n-1)*ldb+k) || (!bT && lb < (k-1)*ldb+n) {
		return false
	}
	return lc >= (m-1)*ldc+n
}
