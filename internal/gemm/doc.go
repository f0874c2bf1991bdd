// Package gemm is the SDK's matrix-product engine: general matrix-matrix
// products C = alpha*op(A)*op(B) + beta*C on row-major float32 and float64
// matrices, with the argument conventions of gonum's blas.Float32.Sgemm and
// blas.Float64.Dgemm (all four transpose cases, leading dimensions at least
// the row length, alpha and beta of any value).
//
// The products are packed and cache-blocked after K. Goto and R. A. van de
// Geijn, "Anatomy of High-Performance Matrix Multiplication", ACM Transactions
// on Mathematical Software 34(3), 2008: op(B) is copied a KC×NC block at a
// time into NR-column strips, op(A) an MC×KC block at a time into MR-row
// strips, and a register-blocked microkernel multiplies one MR-row strip by
// one NR-column strip, keeping the MR×NR tile of C in registers for the whole
// KC-long inner product.
//
// The microkernels are Go assembly on amd64: AVX-512 (12×32 float32, 12×16
// float64) and AVX2 with FMA (6×16 float32, 6×8 float64), chosen once when
// the package loads from the CPU's features (golang.org/x/sys/cpu). Every
// other architecture, and any Engine built WithPortable, runs a portable Go
// microkernel on the same blocked driver, so both paths are tested on one
// machine.
//
// Products big enough to pay for it are split across goroutines, GOMAXPROCS
// of them unless WithThreads says otherwise. An Engine holds no mutable state
// and is safe for concurrent use.
//
// BLAS wraps an Engine as an implementation of gonum's blas.Float32 and
// blas.Float64 (gonum's own implementation for every routine but Sgemm and
// Dgemm), which is what the vae package installs under gorgonia.
//
// NaN and Inf follow IEEE arithmetic on the full products, with two rules of
// the reference BLAS that gonum also keeps: when beta is 0, C is not read (a
// NaN there is overwritten), and when alpha is 0 (or k is 0), A and B are
// not read.
package gemm
