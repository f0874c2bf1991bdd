package gemm

import (
	"runtime"

	"lowerbound.dev/internal/errs"
)

// Engine computes matrix products. The zero value is not usable; build one
// with New. An Engine is immutable and safe for concurrent use.
type Engine struct {
	threads int // 0: runtime.GOMAXPROCS(0) at each call
	f32     *kernel[float32]
	f64     *kernel[float64]
}

// Option configures an Engine.
type Option func(*config)

type config struct {
	threads  int
	portable bool
}

// WithThreads sets how many goroutines one product may use. 0 (the default)
// means runtime.GOMAXPROCS(0), read at each call; 1 keeps every product on
// the calling goroutine. Negative values are an error.
func WithThreads(n int) Option { return func(c *config) { c.threads = n } }

// WithPortable forces the portable Go microkernels even where assembly ones
// are available: for tests, and for comparing the two paths.
func WithPortable() Option { return func(c *config) { c.portable = true } }

// New returns an Engine configured by opts. It fails, wrapping
// errs.InvalidArgument, on a negative thread count.
func New(opts ...Option) (*Engine, error) {
	var c config
	for _, o := range opts {
		o(&c)
	}
	if c.threads < 0 {
		return nil, errs.Arg("gemm.New", "WithThreads", "%d goroutines, want 0 (GOMAXPROCS) or more", c.threads)
	}
	e := &Engine{threads: c.threads, f32: &portable32, f64: &portable64}
	if !c.portable {
		e.f32, e.f64 = best32, best64
	}
	return e, nil
}

// Default returns an Engine with the fastest kernels this CPU supports and
// GOMAXPROCS goroutines per product.
func Default() *Engine { return &Engine{f32: best32, f64: best64} }

// Kernels names the microkernels the Engine runs, float32 then float64, for
// example "avx512 12x32" and "avx512 12x16".
func (e *Engine) Kernels() (f32, f64 string) { return e.f32.name, e.f64.name }

// Threads returns the number of goroutines a large product would use now.
func (e *Engine) Threads() int {
	if e.threads > 0 {
		return e.threads
	}
	return runtime.GOMAXPROCS(0)
}

// Sgemm computes C = alpha*op(A)*op(B) + beta*C for float32 row-major
// matrices with gonum's blas.Float32.Sgemm conventions: op(A) is m×k,
// op(B) is k×n, C is m×n. The arguments must already be valid (BLAS.Sgemm
// checks them); Sgemm itself does not.
func (e *Engine) Sgemm(transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	gemm(e.f32, e.Threads(), transA, transB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}

// Dgemm is Sgemm for float64.
func (e *Engine) Dgemm(transA, transB bool, m, n, k int, alpha float64, a []float64, lda int, b []float64, ldb int, beta float64, c []float64, ldc int) {
	gemm(e.f64, e.Threads(), transA, transB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}
