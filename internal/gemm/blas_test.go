package gemm

import (
	"fmt"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/blas"
	gorgonia "gorgonia.org/gorgonia"
)

// BLAS must be usable wherever gorgonia takes one.
var _ gorgonia.BLAS = BLAS{}

func TestBLASMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(11, 12))
	portable, err := New(WithPortable())
	if err != nil {
		t.Fatal(err)
	}
	for _, b := range []BLAS{{}, NewBLAS(portable)} {
		for _, tA := range []blas.Transpose{blas.NoTrans, blas.Trans, blas.ConjTrans} {
			for _, tB := range []blas.Transpose{blas.NoTrans, blas.Trans, blas.ConjTrans} {
				p := newProblem[float32](rng, tA != blas.NoTrans, tB != blas.NoTrans, 17, 40, 23, 2, 0.7, 0.3)
				want := p.want()
				got := append([]float32(nil), p.c...)
				b.Sgemm(tA, tB, p.m, p.n, p.k, p.alpha, p.a, p.lda, p.b, p.ldb, p.beta, got, p.ldc)
				p.check(t, fmt.Sprintf("Sgemm %c%c", tA, tB), got, want)

				q := newProblem[float64](rng, tA != blas.NoTrans, tB != blas.NoTrans, 17, 40, 23, 2, 0.7, 0.3)
				want64 := q.want()
				got64 := append([]float64(nil), q.c...)
				b.Dgemm(tA, tB, q.m, q.n, q.k, q.alpha, q.a, q.lda, q.b, q.ldb, q.beta, got64, q.ldc)
				q.check(t, fmt.Sprintf("Dgemm %c%c", tA, tB), got64, want64)
			}
		}
	}
}

// Bad arguments panic exactly as gonum's do (the blas interface has no
// error results), and arguments gonum accepts do not panic.
func TestBLASArgumentChecks(t *testing.T) {
	a, b, c := make([]float32, 12), make([]float32, 12), make([]float32, 12)
	cases := []struct {
		name          string
		tA, tB        blas.Transpose
		m, n, k       int
		lda, ldb, ldc int
		la, lb, lc    int
	}{
		{"ok", blas.NoTrans, blas.NoTrans, 3, 4, 3, 3, 4, 4, 9, 12, 12},
		{"ok empty", blas.NoTrans, blas.NoTrans, 0, 4, 3, 3, 4, 4, 0, 12, 0},
		{"ok k=0", blas.Trans, blas.NoTrans, 3, 4, 0, 3, 4, 4, 0, 0, 12},
		{"bad tA", 'x', blas.NoTrans, 3, 4, 3, 3, 4, 4, 9, 12, 12},
		{"bad tB", blas.NoTrans, 'y', 3, 4, 3, 3, 4, 4, 9, 12, 12},
		{"m<0", blas.NoTrans, blas.NoTrans, -1, 4, 3, 3, 4, 4, 9, 12, 12},
		{"n<0", blas.NoTrans, blas.NoTrans, 3, -1, 3, 3, 4, 4, 9, 12, 12},
		{"k<0", blas.NoTrans, blas.NoTrans, 3, 4, -1, 3, 4, 4, 9, 12, 12},
		{"lda", blas.NoTrans, blas.NoTrans, 3, 4, 3, 2, 4, 4, 9, 12, 12},
		{"lda trans", blas.Trans, blas.NoTrans, 3, 4, 3, 2, 4, 4, 9, 12, 12},
		{"ldb", blas.NoTrans, blas.NoTrans, 3, 4, 3, 3, 3, 4, 9, 12, 12},
		{"ldb trans", blas.NoTrans, blas.Trans, 3, 4, 3, 3, 2, 4, 9, 12, 12},
		{"ldc", blas.NoTrans, blas.NoTrans, 3, 4, 3, 3, 4, 3, 9, 12, 12},
		{"short a", blas.NoTrans, blas.NoTrans, 3, 4, 3, 3, 4, 4, 8, 12, 12},
		{"short b", blas.NoTrans, blas.NoTrans, 3, 4, 3, 3, 4, 4, 9, 11, 12},
		{"short c", blas.NoTrans, blas.NoTrans, 3, 4, 3, 3, 4, 4, 9, 12, 11},
	}
	catch := func(f func()) (r any) {
		defer func() { r = recover() }()
		f()
		return nil
	}
	for _, tc := range cases {
		got := catch(func() {
			BLAS{}.Sgemm(tc.tA, tc.tB, tc.m, tc.n, tc.k, 1, a[:tc.la], tc.lda, b[:tc.lb], tc.ldb, 0, c[:tc.lc], tc.ldc)
		})
		want := catch(func() {
			ref.Sgemm(tc.tA, tc.tB, tc.m, tc.n, tc.k, 1, a[:tc.la], tc.lda, b[:tc.lb], tc.ldb, 0, c[:tc.lc], tc.ldc)
		})
		if fmt.Sprint(got) != fmt.Sprint(want) {
			t.Errorf("%s: panic %v, gonum panics %v", tc.name, got, want)
		}
	}
}
