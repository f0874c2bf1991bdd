//go:build amd64

package gemm

import "golang.org/x/sys/cpu"

// AVX2 microkernels (kernel_amd64.s), with the microFunc contract. Each
// needs kc >= 1.
//
//go:noescape
func sgemm6x16AVX2(kc int, a, b, c *float32, ldc int, alpha, beta float32)

//go:noescape
func dgemm6x8AVX2(kc int, a, b, c *float64, ldc int, alpha, beta float64)

// The assembly kernels and their blocking. kc×nr of packed B (32 KiB at
// kc = 256 for both AVX-512 kernels) sits in L1 while mc×kc of packed A
// streams from L2 (384 KiB); nc×kc of packed B (1 MiB) stays in L2 of the
// machines this was tuned on (2 MiB L2 per core).
var (
	avx512f32 = kernel[float32]{name: "avx512 12x32", mr: 12, nr: 32, kc: 256, mc: 384, nc: 1024, micro: sgemm12x32AVX512, tile: sgemmTileAVX512}
	avx512f64 = kernel[float64]{name: "avx512 12x16", mr: 12, nr: 16, kc: 256, mc: 192, nc: 512, micro: dgemm12x16AVX512, tile: dgemmTileAVX512}
	avx2f32   = kernel[float32]{name: "avx2 6x16", mr: 6, nr: 16, kc: 256, mc: 192, nc: 1024, micro: sgemm6x16AVX2}
	avx2f64   = kernel[float64]{name: "avx2 6x8", mr: 6, nr: 8, kc: 256, mc: 96, nc: 512, micro: dgemm6x8AVX2}
)

// best32 and best64 are chosen once, when the package loads.
var best32, best64 = pick()

func pick() (*kernel[float32], *kernel[float64]) {
	switch {
	case cpu.X86.HasAVX512F:
		return &avx512f32, &avx512f64
	case cpu.X86.HasAVX2 && cpu.X86.HasFMA:
		return &avx2f32, &avx2f64
	}
	return &portable32, &portable64
}

// kernelsForTest lists every kernel this CPU can run, for the tests.
func kernelsForTest() ([]*kernel[float32], []*kernel[float64]) {
	k32, k64 := []*kernel[float32]{&portable32}, []*kernel[float64]{&portable64}
	if cpu.X86.HasAVX2 && cpu.X86.HasFMA {
		k32, k64 = append(k32, &avx2f32), append(k64, &avx2f64)
	}
	if cpu.X86.HasAVX512F {
		k32, k64 = append(k32, &avx512f32), append(k64, &avx512f64)
	}
	return k32, k64
}

// The AVX-512 kernels (kernel_avx512_amd64.s, generated) exist for every
// tile height 1..12 and one or two vectors of columns, and mask their loads
// and stores of C to the tile's columns, so edge tiles are written in place.

func sgemmTileAVX512(kc int, a, b, c *float32, ldc int, alpha, beta float32, rows, cols, ldb, ars, aps int) {
	v := 0
	if cols > 16 {
		v = 1
	}
	avx512s[rows-1][v](kc, a, b, c, ldc, alpha, beta, 1<<cols-1, ldb, ars, aps)
}

func dgemmTileAVX512(kc int, a, b, c *float64, ldc int, alpha, beta float64, rows, cols, ldb, ars, aps int) {
	v := 0
	if cols > 8 {
		v = 1
	}
	avx512d[rows-1][v](kc, a, b, c, ldc, alpha, beta, 1<<cols-1, ldb, ars, aps)
}

func sgemm12x32AVX512(kc int, a, b, c *float32, ldc int, alpha, beta float32) {
	sgemmAVX512R12V2(kc, a, b, c, ldc, alpha, beta, 1<<32-1, 32, 1, 12)
}

func dgemm12x16AVX512(kc int, a, b, c *float64, ldc int, alpha, beta float64) {
	dgemmAVX512R12V2(kc, a, b, c, ldc, alpha, beta, 1<<16-1, 16, 1, 12)
}
