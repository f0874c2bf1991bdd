//go:build !openblas

package vae

// BLAS names the matrix library the graphs run on: gonum's pure Go BLAS in
// the default build. Build with -tags openblas (cgo, and Debian's
// libopenblas-dev or an equivalent) to run them on OpenBLAS instead.
const BLAS = "gonum (pure Go)"
