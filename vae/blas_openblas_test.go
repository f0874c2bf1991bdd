//go:build openblas

package vae

import (
	"testing"

	"gonum.org/v1/netlib/blas/netlib"
	G "gorgonia.org/gorgonia"
)

// With -tags openblas every graph runs on OpenBLAS. The rest of the suite,
// run with the same tag, checks the numbers against gonum's references.
func TestOpenBLASInUse(t *testing.T) {
	if _, ok := G.WhichBLAS().(netlib.Implementation); !ok {
		t.Fatalf("gorgonia uses %T, want netlib.Implementation (OpenBLAS)", G.WhichBLAS())
	}
	if BLAS == "" {
		t.Fatal("BLAS name is empty")
	}
}
