package gemm

import (
	"sync"
	"unsafe"
)

// float is the element types the engine serves.
type float interface{ ~float32 | ~float64 }

// microFunc multiplies one packed MR-row strip of A (kc groups of mr values,
// one group per step of the inner dimension) by one packed NR-column strip of
// B (kc groups of nr values) and writes the full mr×nr tile
//
//	C = alpha*(A·B) + beta*C
//
// at c with row stride ldc (in elements). When beta is 0, C is not read.
type microFunc[T float] func(kc int, a, b, c *T, ldc int, alpha, beta T)

// kernel is one microkernel with the block sizes the driver uses around it
// (the names follow Goto and van de Geijn 2008): mr×nr is the register tile,
// kc the inner-dimension block, mc and nc the row and column blocks of C.
// kc×nr values of packed B should stay in L1 cache while the kernel streams
// A, and mc×kc values of packed A in L2.
type kernel[T float] struct {
	name       string
	mr, nr     int
	kc, mc, nc int
	micro      microFunc[T]
	// tile, when set, computes a tile of any rows <= mr and cols <= nr in
	// place, reading only those columns of B, whose rows are ldb elements
	// apart (nr for packed B); otherwise the same contract as micro. Edge
	// tiles then skip the detour through a scratch tile, and op(B) = B can
	// be read where it is, unpacked. Likewise element (r, p) of A is at
	// r*ars + p*aps: ars = 1 and aps = mr for packed A, ars = lda and aps = 1
	// for op(A) = A read in place.
	tile func(kc int, a, b, c *T, ldc int, alpha, beta T, rows, cols, ldb, ars, aps int)
	// pool caches packing buffers (*buffers[T]) across calls: the one
	// thing in the package that changes after it loads, safe for
	// concurrent use and invisible to callers.
	pool sync.Pool
}

// portable32 and portable64 are the pure-Go kernels: a 4×4 register tile,
// which the Go compiler keeps in registers on amd64 and arm64.
var (
	portable32 = kernel[float32]{name: "go 4x4", mr: 4, nr: 4, kc: 256, mc: 128, nc: 1024, micro: micro4x4[float32]}
	portable64 = kernel[float64]{name: "go 4x4", mr: 4, nr: 4, kc: 256, mc: 128, nc: 512, micro: micro4x4[float64]}
)

// micro4x4 is the portable microkernel (mr = nr = 4).
func micro4x4[T float](kc int, a, b, c *T, ldc int, alpha, beta T) {
	ap := unsafe.Slice(a, 4*kc)
	bp := unsafe.Slice(b, 4*kc)
	var c00, c01, c02, c03, c10, c11, c12, c13, c20, c21, c22, c23, c30, c31, c32, c33 T
	for p := 0; p+4 <= len(ap) && p+4 <= len(bp); p += 4 {
		a0, a1, a2, a3 := ap[p], ap[p+1], ap[p+2], ap[p+3]
		b0, b1, b2, b3 := bp[p], bp[p+1], bp[p+2], bp[p+3]
		c00 += a0 * b0
		c01 += a0 * b1
		c02 += a0 * b2
		c03 += a0 * b3
		c10 += a1 * b0
		c11 += a1 * b1
		c12 += a1 * b2
		c13 += a1 * b3
		c20 += a2 * b0
		c21 += a2 * b1
		c22 += a2 * b2
		c23 += a2 * b3
		c30 += a3 * b0
		c31 += a3 * b1
		c32 += a3 * b2
		c33 += a3 * b3
	}
	cs := unsafe.Slice(c, 3*ldc+4)
	store4(cs[0:4:4], c00, c01, c02, c03, alpha, beta)
	store4(cs[ldc:ldc+4:ldc+4], c10, c11, c12, c13, alpha, beta)
	store4(cs[2*ldc:2*ldc+4:2*ldc+4], c20, c21, c22, c23, alpha, beta)
	store4(cs[3*ldc:3*ldc+4:3*ldc+4], c30, c31, c32, c33, alpha, beta)
}

func store4[T float](c []T, x0, x1, x2, x3, alpha, beta T) {
	if beta == 0 {
		c[0], c[1], c[2], c[3] = alpha*x0, alpha*x1, alpha*x2, alpha*x3
		return
	}
	c[0] = alpha*x0 + beta*c[0]
	c[1] = alpha*x1 + beta*c[1]
	c[2] = alpha*x2 + beta*c[2]
	c[3] = alpha*x3 + beta*c[3]
}
