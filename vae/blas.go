//go:build !openblas

package vae

import (
	G "gorgonia.org/gorgonia"

	"lowerbound.dev/internal/gemm"
)

// BLAS names the matrix library the graphs run on. In the default build
// (pure Go, no cgo) that is the SDK's own matrix-product engine: packed,
// cache-blocked products with AVX-512 or AVX2 assembly microkernels on
// amd64 (picked from the CPU's features when the program starts) and a
// portable Go kernel elsewhere, split across GOMAXPROCS goroutines when a
// product is large enough; every other BLAS routine is gonum's pure Go one.
// Build with -tags openblas (cgo, and Debian's libopenblas-dev or an
// equivalent) to run the graphs on OpenBLAS instead.
//
// Importing vae installs the engine with gorgonia.Use, once, in an init
// function. gorgonia keeps one BLAS for the whole process (its Use also sets
// the tensor package's), so a program that wants another one calls
// gorgonia.Use itself after the imports have run, for example in main,
// before it builds or runs any graph.
const BLAS = "lowerbound gemm (pure Go; AVX-512/AVX2 assembly kernels on amd64)"

func init() { G.Use(gemm.BLAS{}) }
