// Package internal holds code shared by the SDK's own packages and commands
// that is not part of the public API: the matrix-product engine the graphs
// run on (gemm), the MNIST locator and the benchmark commands live below it.
package internal
