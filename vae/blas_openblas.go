//go:build openblas

package vae

// #cgo LDFLAGS: -lopenblas
import "C"

import (
	"gonum.org/v1/netlib/blas/netlib"
	G "gorgonia.org/gorgonia"
)

// BLAS names the matrix library the graphs run on. This build (-tags
// openblas) runs them on OpenBLAS through gonum's netlib binding, which
// needs cgo and the OpenBLAS library (Debian: libopenblas-dev). OpenBLAS
// picks its own thread count; set OPENBLAS_NUM_THREADS to fix it.
const BLAS = "OpenBLAS (cgo, gonum netlib binding)"

// The build tag is the opt-in: gorgonia keeps one BLAS for the whole
// process, chosen here once, before any graph is built.
func init() { G.Use(netlib.Implementation{}) }
