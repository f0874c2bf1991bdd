package gemm

import (
	"runtime"

	"lowerbound.dev/internal/errs"
)

// Engine computes matrix products. The zero value is not usable; build one
// with New. An Engine is immutable and safe for concurrent use.
type Engine struct {
	threads  int // 0: runtime.GOMAXPROCS(0) at each call
	splitMin int // products below this many multiply-adds run on one goroutine
	f32      *kernel[float32]
	f64      *kernel[float64]
}

// DefaultSplitMin is the smallest product, in multiply-adds (m·n·k), that
// an Engine splits across goroutines unless WithSplitMin says otherwise.
// Measured with gemmbench on the 2-vCPU machines here: two goroutines lost
// 10-30% on the training products of the 784-200-200-50 benchmark model
// (4 to 16 million multiply-adds; the second goroutine's start, the shared
// caches and the thinner parts cost more than the second core gave) and
// gained about 10% from 31 million up (the 784-400 products).
const DefaultSplitMin = 1 << 24

// Option configures an Engine.
type Option func(*config)

type config struct {
	threads  int
	splitMin int
	portable bool
}

// WithThreads sets how many goroutines one product may use. 0 (the default)
// means runtime.GOMAXPROCS(0), read at each call; 1 keeps every product on
// the calling goroutine. Negative values are an error.
func WithThreads(n int) Option { return func(c *config) { c.threads = n } }

// WithSplitMin sets the smallest product, in multiply-adds (m·n·k), that
// is split across goroutines; 0 means DefaultSplitMin. Below 1<<20 the
// engine never splits, whatever the setting. Negative values are an error.
func WithSplitMin(n int) Option { return func(c *config) { c.splitMin = n } }

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
	if c.splitMin < 0 {
		return nil, errs.Arg("gemm.New", "WithSplitMin", "%d multiply-adds, want 0 (DefaultSplitMin) or more", c.splitMin)
	}
	if c.splitMin == 0 {
		c.splitMin = DefaultSplitMin
	}
	e := &Engine{threads: c.threads, splitMin: c.splitMin, f32: &portable32, f64: &portable64}
	if !c.portable {
		e.f32, e.f64 = best32, best64
	}
	return e, nil
}

// Default returns an Engine with the fastest kernels this CPU supports and
// GOMAXPROCS goroutines per product.
func Default() *Engine { return &Engine{splitMin: DefaultSplitMin, f32: best32, f64: best64} }

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

// threadsFor is the number of goroutines an m×n×k product may use.
func (e *Engine) threadsFor(m, n, k int) int {
	if m*n*k < e.splitMin {
		return 1
	}
	return e.Threads()
}

// Sgemm computes C = alpha*op(A)*op(B) + beta*C for float32 row-major
// matrices with gonum's blas.Float32.Sgemm conventions: op(A) is m×k,
// op(B) is k×n, C is m×n. The arguments must already be valid (BLAS.Sgemm
// checks them); Sgemm itself does not.
func (e *Engine) Sgemm(transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	gemm(e.f32, e.threadsFor(m, n, k), transA, transB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}

// Dgemm is Sgemm for float64.
func (e *Engine) Dgemm(transA, transB bool, m, n, k int, alpha float64, a []float64, lda int, b []float64, ldb int, beta float64, c []float64, ldc int) {
	gemm(e.f64, e.threadsFor(m, n, k), transA, transB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}
