//go:build openblas

package vae

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/gonum"
	"gonum.org/v1/netlib/blas/netlib"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// With -tags openblas every graph runs on OpenBLAS. These tests check that
// the switch took effect, and that products through a gorgonia graph on
// OpenBLAS (forward: A B and A v; backward: the transposed products of the
// gradients) match gonum's pure-Go reference BLAS (blas/gonum) called
// directly.
func TestOpenBLASInUse(t *testing.T) {
	if _, ok := G.WhichBLAS().(netlib.Implementation); !ok {
		t.Fatalf("gorgonia uses %T, want netlib.Implementation (OpenBLAS)", G.WhichBLAS())
	}
	if _, ok := tensor.WhichBLAS().(netlib.Implementation); !ok {
		t.Fatalf("the tensor package uses %T, want netlib.Implementation (OpenBLAS)", tensor.WhichBLAS())
	}
	if BLAS != "OpenBLAS (cgo, gonum netlib binding)" {
		t.Fatalf("BLAS = %q in the openblas build", BLAS)
	}
}

func randSlice(rng *rand.Rand, n int) []float64 {
	v := make([]float64, n)
	for i := range v {
		v[i] = rng.NormFloat64()
	}
	return v
}

// gemmRef returns op(a) op(b) (m x n, row-major) by gonum's reference
// Dgemm; ta and tb say whether a and b are stored transposed.
func gemmRef(ta, tb bool, m, n, k int, a, b []float64) []float64 {
	tA, tB := blas.NoTrans, blas.NoTrans
	lda, ldb := k, n
	if ta {
		tA, lda = blas.Trans, m
	}
	if tb {
		tB, ldb = blas.Trans, k
	}
	c := make([]float64, m*n)
	gonum.Implementation{}.Dgemm(tA, tB, m, n, k, 1, a, lda, b, ldb, 0, c, n)
	return c
}

func TestOpenBLASGraphProductsMatchGonum(t *testing.T) {
	// Odd sizes, so that OpenBLAS runs its edge kernels as well as its
	// blocked ones.
	const m, k, n = 67, 45, 33
	rng := rand.New(rand.NewPCG(1, 2))
	a, b, c, v := randSlice(rng, m*k), randSlice(rng, k*n), randSlice(rng, m*n), randSlice(rng, k)
	// Reference: Y = A B; for cost = sum(Y .* C) + sum(A v),
	// dA = C B^T + 1 v^T and dB = A^T C (matrix calculus, common knowledge),
	// all by gonum's reference BLAS.
	wantY := gemmRef(false, false, m, n, k, a, b)
	wantAv := gemmRef(false, false, m, 1, k, a, v)
	wantDA := gemmRef(false, true, m, k, n, c, b)
	for i := range m {
		for j := range k {
			wantDA[i*k+j] += v[j]
		}
	}
	wantDB := gemmRef(true, false, k, n, m, a, c)

	for _, dt := range []tensor.Dtype{tensor.Float64, tensor.Float32} {
		g := G.NewGraph()
		dense := func(vals []float64, shape ...int) *tensor.Dense {
			if dt == tensor.Float64 {
				return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(append([]float64(nil), vals...)))
			}
			f := make([]float32, len(vals))
			for i, x := range vals {
				f[i] = float32(x)
			}
			return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(f))
		}
		aN := G.NewMatrix(g, dt, G.WithShape(m, k), G.WithName("a"), G.WithValue(dense(a, m, k)))
		bN := G.NewMatrix(g, dt, G.WithShape(k, n), G.WithName("b"), G.WithValue(dense(b, k, n)))
		cN := G.NewMatrix(g, dt, G.WithShape(m, n), G.WithName("c"), G.WithValue(dense(c, m, n)))
		vN := G.NewVector(g, dt, G.WithShape(k), G.WithName("v"), G.WithValue(dense(v, k)))
		y := G.Must(G.Mul(aN, bN))  // gemm
		av := G.Must(G.Mul(aN, vN)) // gemv
		var yv, avv G.Value
		G.Read(y, &yv)
		G.Read(av, &avv)
		cost := G.Must(G.Add(G.Must(G.Sum(G.Must(G.HadamardProd(y, cN)))), G.Must(G.Sum(av))))
		if _, err := G.Grad(cost, aN, bN); err != nil {
			t.Fatal(err)
		}
		vm := G.NewTapeMachine(g, G.BindDualValues(aN, bN))
		if err := vm.RunAll(); err != nil {
			t.Fatal(err)
		}
		da, err := aN.Grad()
		if err != nil {
			t.Fatal(err)
		}
		db, err := bN.Grad()
		if err != nil {
			t.Fatal(err)
		}
		// Tolerance: each value is a sum of up to 67 products of N(0,1)
		// numbers (size about 8); different summation orders differ by a
		// few ulps of the partial sums: 1e-12 in float64, 1e-4 in float32
		// (about 2^-23 times 8 times a few hundred roundings), absolute.
		tol := 1e-12
		if dt == tensor.Float32 {
			tol = 1e-4
		}
		for _, chk := range []struct {
			what string
			got  G.Value
			want []float64
		}{{"A B", yv, wantY}, {"A v", avv, wantAv}, {"dA", da, wantDA}, {"dB", db, wantDB}} {
			got := denseFloats(chk.got.(*tensor.Dense))
			if len(got) != len(chk.want) {
				t.Fatalf("%v %s: %d values, want %d", dt, chk.what, len(got), len(chk.want))
			}
			for i := range got {
				if math.Abs(got[i]-chk.want[i]) > tol*math.Max(1, math.Abs(chk.want[i])) {
					t.Fatalf("%v %s[%d] = %.15g, gonum reference %.15g", dt, chk.what, i, got[i], chk.want[i])
				}
			}
		}
		vm.Close()
	}
}
