package gemm

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"sync"
	"testing"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/gonum"

	"lowerbound.dev/internal/errs"
)

// The reference throughout is gonum's pure-Go BLAS (gonum.org/v1/gonum/blas/gonum).
var ref gonum.Implementation

// problem is one product C = alpha*op(A)*op(B) + beta*C with row-major
// storage and leading dimensions padded past the row length (strided views).
type problem[T float] struct {
	tA, tB        bool
	m, n, k       int
	alpha, beta   T
	a, b, c       []T
	lda, ldb, ldc int
	mag           *[]float64 // |alpha| sum_l |A_il||B_lj| + |beta||C_ij|, computed once by check
}

func newProblem[T float](rng *rand.Rand, tA, tB bool, m, n, k, pad int, alpha, beta T) problem[T] {
	p := problem[T]{tA: tA, tB: tB, m: m, n: n, k: k, alpha: alpha, beta: beta, mag: new([]float64)}
	ar, ac := m, k
	if tA {
		ar, ac = k, m
	}
	br, bc := k, n
	if tB {
		br, bc = n, k
	}
	p.lda, p.ldb, p.ldc = max(ac, 1)+pad, max(bc, 1)+pad, max(n, 1)+pad
	p.a = randSlice[T](rng, max(ar, 1)*p.lda)
	p.b = randSlice[T](rng, max(br, 1)*p.ldb)
	p.c = randSlice[T](rng, max(m, 1)*p.ldc)
	return p
}

// randSlice fills a slice with uniform values in (-1, 1) (never exactly 0, so
// no product is skipped as gonum's loops skip zeros of A).
func randSlice[T float](rng *rand.Rand, n int) []T {
	s := make([]T, n)
	for i := range s {
		v := 2*rng.Float64() - 1
		if v == 0 {
			v = 0.5
		}
		s[i] = T(v)
	}
	return s
}

func trans(t bool) blas.Transpose {
	if t {
		return blas.Trans
	}
	return blas.NoTrans
}

// want runs the problem through gonum on a copy of C.
func (p problem[T]) want() []T {
	c := append([]T(nil), p.c...)
	switch a := any(p.a).(type) {
	case []float32:
		ref.Sgemm(trans(p.tA), trans(p.tB), p.m, p.n, p.k, float32(p.alpha), a, p.lda, any(p.b).([]float32), p.ldb, float32(p.beta), any(c).([]float32), p.ldc)
	case []float64:
		ref.Dgemm(trans(p.tA), trans(p.tB), p.m, p.n, p.k, float64(p.alpha), a, p.lda, any(p.b).([]float64), p.ldb, float64(p.beta), any(c).([]float64), p.ldc)
	}
	return c
}

// got runs the problem on kernel kn with the given thread count.
func (p problem[T]) got(kn *kernel[T], threads int) []T {
	c := append([]T(nil), p.c...)
	gemm(kn, threads, p.tA, p.tB, p.m, p.n, p.k, p.alpha, p.a, p.lda, p.b, p.ldb, p.beta, c, p.ldc)
	return c
}

// opA and opB read op(A)[i][l] and op(B)[l][j].
func (p problem[T]) opA(i, l int) T {
	if p.tA {
		return p.a[l*p.lda+i]
	}
	return p.a[i*p.lda+l]
}

func (p problem[T]) opB(l, j int) T {
	if p.tB {
		return p.b[j*p.ldb+l]
	}
	return p.b[l*p.ldb+j]
}

// check compares got with want element by element.
//
// Tolerance: the two results sum the same k products in different orders
// (and ours with fused multiply-adds), so each differs from the exact value
// by at most gamma_{k+2} * (|alpha| sum_l |A_il||B_lj| + |beta||C_ij|), where
// gamma_n = n*u/(1-n*u) and u is the unit roundoff (Higham, "Accuracy and
// Stability of Numerical Algorithms", 2nd ed. 2002, section 3.1, bound
// (3.4) for inner products, plus one rounding each for alpha and beta). The
// check allows twice that, (2k+4)*u times the magnitude, which a wrong index
// or a dropped term (an O(1) relative error) exceeds by orders of magnitude.
// Where gonum's result is NaN or ±Inf, ours must be the same.
// Padding between rows (ldc > n) must be untouched.
func (p problem[T]) check(t *testing.T, label string, got, want []T) {
	t.Helper()
	var zero T
	u := math.Ldexp(1, -53)
	if _, ok := any(zero).(float32); ok {
		u = math.Ldexp(1, -24)
	}
	tol := float64(2*p.k+4) * u
	if *p.mag == nil {
		mag := make([]float64, len(p.c))
		for row := range p.m {
			for col := range p.n {
				i := row*p.ldc + col
				if p.beta != 0 { // beta 0: C is not read
					mag[i] = math.Abs(float64(p.beta)) * math.Abs(float64(p.c[i]))
				}
				for l := range p.k {
					mag[i] += math.Abs(float64(p.alpha)) * math.Abs(float64(p.opA(row, l))*float64(p.opB(l, col)))
				}
			}
		}
		*p.mag = mag
	}
	bad := 0
	for i := range got {
		row, col := i/p.ldc, i%p.ldc
		g, w := float64(got[i]), float64(want[i])
		if row >= p.m || col >= p.n {
			if got[i] != want[i] && !(math.IsNaN(g) && math.IsNaN(w)) {
				t.Errorf("%s: C[%d] outside the %dx%d product changed: %v, want %v", label, i, p.m, p.n, g, w)
				bad++
			}
		} else {
			switch {
			case math.IsNaN(w):
				if !math.IsNaN(g) {
					t.Errorf("%s: C[%d][%d] = %v, want NaN", label, row, col, g)
					bad++
				}
			case math.IsInf(w, 0):
				if g != w {
					t.Errorf("%s: C[%d][%d] = %v, want %v", label, row, col, g, w)
					bad++
				}
			default:
				mag := (*p.mag)[i]
				if d := math.Abs(g - w); !(d <= tol*mag) {
					t.Errorf("%s: C[%d][%d] = %v, want %v (|diff| %.3g > bound %.3g)", label, row, col, g, w, d, tol*mag)
					bad++
				}
			}
		}
		if bad >= 3 {
			t.Errorf("%s: more errors not shown", label)
			return
		}
	}
}

// shapes: 1x1, primes, sizes on both sides of the register tiles (4, 6, 8,
// 12, 16, 32) and of the cache blocks (kc = 256, mc = 96..384, nc = 512 and
// 1024). The AVX-512 driver reads A and B in place unless their row stride
// in bytes shares a factor above 64 with 4096; {32, 20, 64} and {64, 32, 96}
// without padding take the packing path for A (either transpose) and B.
var shapes = [][3]int{
	{32, 20, 64}, {64, 32, 96},
	{1, 1, 1}, {1, 7, 1}, {7, 1, 13}, {2, 3, 5}, {13, 31, 37}, {12, 32, 8}, {24, 64, 16},
	{11, 33, 17}, {97, 101, 103}, {6, 16, 257}, {25, 47, 513}, {385, 19, 30},
	{13, 1030, 9}, {0, 5, 3}, {5, 0, 3}, {5, 4, 0},
}

var scalars = [][2]float64{{1, 0}, {1, 1}, {0, 0}, {0, 1}, {0, 2}, {-1.5, 0.5}, {0.5, -2}}

// threadCounts are the goroutine counts each product runs on: 3 (an uneven
// split) only without -short.
func threadCounts() []int {
	if testing.Short() {
		return []int{1, 2}
	}
	return []int{1, 2, 3}
}

func runAll[T float](t *testing.T, kernels []*kernel[T]) {
	rng := rand.New(rand.NewPCG(1, 2))
	for _, kn := range kernels {
		for _, sh := range shapes {
			for _, tA := range []bool{false, true} {
				for _, tB := range []bool{false, true} {
					for si, ab := range scalars {
						pad := (si % 3) * 3 // leading dimensions n, n+3, n+6
						p := newProblem(rng, tA, tB, sh[0], sh[1], sh[2], pad, T(ab[0]), T(ab[1]))
						want := p.want()
						for _, threads := range threadCounts() {
							label := fmt.Sprintf("%s %dx%dx%d tA=%v tB=%v alpha=%v beta=%v lead+%d threads=%d",
								kn.name, sh[0], sh[1], sh[2], tA, tB, ab[0], ab[1], pad, threads)
							p.check(t, label, p.got(kn, threads), want)
						}
					}
				}
			}
		}
	}
}

func TestSgemmMatchesGonum(t *testing.T) {
	k32, _ := kernelsForTest()
	runAll(t, k32)
}

func TestDgemmMatchesGonum(t *testing.T) {
	_, k64 := kernelsForTest()
	runAll(t, k64)
}

// Products big enough (m·n·k >= parMin) to be split across goroutines by
// rows and by columns, one of them over two kc blocks.
func TestParallelSplits(t *testing.T) {
	k32, k64 := kernelsForTest()
	rng := rand.New(rand.NewPCG(3, 4))
	for _, sh := range [][3]int{{60, 130, 140}, {140, 60, 130}, {30, 40, 900}} {
		for _, kn := range k32 {
			if parts, _ := split(kn, 2, sh[0], sh[1], sh[2]); parts != 2 {
				t.Errorf("%s %v: split into %d parts, want 2", kn.name, sh, parts)
			}
			p := newProblem[float32](rng, false, true, sh[0], sh[1], sh[2], 1, 1, 0.5)
			want := p.want()
			p.check(t, kn.name+fmt.Sprint(sh), p.got(kn, 2), want)
		}
		for _, kn := range k64 {
			p := newProblem[float64](rng, true, false, sh[0], sh[1], sh[2], 1, 1, 0.5)
			want := p.want()
			p.check(t, kn.name+fmt.Sprint(sh), p.got(kn, 2), want)
		}
	}
}

// NaN and Inf in A, B or C propagate as they do in gonum; with beta 0 a NaN
// in C is overwritten (gonum zeroes C first), with beta 1 it stays.
func TestNaNInf(t *testing.T) {
	k32, k64 := kernelsForTest()
	nanInf(t, k32)
	nanInf(t, k64)
}

func nanInf[T float](t *testing.T, kernels []*kernel[T]) {
	rng := rand.New(rand.NewPCG(5, 6))
	nan, inf := T(math.NaN()), T(math.Inf(1))
	for _, kn := range kernels {
		for _, tA := range []bool{false, true} {
			for _, tB := range []bool{false, true} {
				for _, beta := range []T{0, 1, 0.5} {
					for _, where := range []string{"A", "B", "C"} {
						for _, v := range []T{nan, inf, -inf} {
							p := newProblem(rng, tA, tB, 29, 37, 19, 2, 1, beta)
							switch where {
							case "A":
								p.a[3*p.lda+5] = v
							case "B":
								p.b[4*p.ldb+7] = v
							case "C":
								p.c[6*p.ldc+9] = v
								p.c[20*p.ldc+36] = v
							}
							want := p.want()
							label := fmt.Sprintf("%s tA=%v tB=%v beta=%v %v in %s", kn.name, tA, tB, beta, v, where)
							p.check(t, label, p.got(kn, 1), want)
						}
					}
				}
			}
		}
	}
}

// When alpha is 0 the reference BLAS (netlib dgemm.f: "IF (ALPHA.EQ.ZERO)"
// scales C by beta and returns) does not read A or B, so NaN there does not
// reach C. gonum agrees for A·B (its loop skips zero multipliers); the check
// here is the closed form C = beta*C.
func TestAlphaZeroDoesNotReadAB(t *testing.T) {
	k32, _ := kernelsForTest()
	rng := rand.New(rand.NewPCG(7, 8))
	for _, kn := range k32 {
		for _, beta := range []float32{0, 1, -2} {
			p := newProblem[float32](rng, false, true, 14, 33, 9, 1, 0, beta)
			for i := range p.a {
				p.a[i] = float32(math.NaN())
			}
			got := p.got(kn, 1)
			for i := range p.m {
				for j := range p.n {
					if w := beta * p.c[i*p.ldc+j]; got[i*p.ldc+j] != w {
						t.Fatalf("%s beta=%v: C[%d][%d] = %v, want beta*C = %v", kn.name, beta, i, j, got[i*p.ldc+j], w)
					}
				}
			}
		}
	}
}

// Many products at once on one Engine, each split across goroutines: run
// with -race.
func TestConcurrentProducts(t *testing.T) {
	e, err := New(WithThreads(2))
	if err != nil {
		t.Fatal(err)
	}
	var wg sync.WaitGroup
	errc := make(chan string, 8)
	for g := range 8 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			rng := rand.New(rand.NewPCG(uint64(g), 9))
			p := newProblem[float32](rng, g%2 == 0, g%3 == 0, 100, 120, 90, 1, 1, 0)
			want := p.want()
			got := append([]float32(nil), p.c...)
			e.Sgemm(p.tA, p.tB, p.m, p.n, p.k, p.alpha, p.a, p.lda, p.b, p.ldb, p.beta, got, p.ldc)
			for i := range got {
				if d := math.Abs(float64(got[i] - want[i])); d > 1e-4 {
					errc <- fmt.Sprintf("goroutine %d: C[%d] = %v, want %v", g, i, got[i], want[i])
					return
				}
			}
		}()
	}
	wg.Wait()
	close(errc)
	for msg := range errc {
		t.Error(msg)
	}
}

func TestNewRejectsNegativeThreads(t *testing.T) {
	if _, err := New(WithThreads(-1)); !errors.Is(err, errs.InvalidArgument) {
		t.Fatalf("New(WithThreads(-1)) error = %v, want one wrapping errs.InvalidArgument", err)
	}
	e, err := New(WithPortable(), WithThreads(3))
	if err != nil {
		t.Fatal(err)
	}
	if f32, f64 := e.Kernels(); f32 != portable32.name || f64 != portable64.name || e.Threads() != 3 {
		t.Fatalf("New(WithPortable(), WithThreads(3)) runs %q/%q on %d threads", f32, f64, e.Threads())
	}
}

// split picks the dimension whose largest part is smallest.
func TestSplitDirection(t *testing.T) {
	kn := &portable32 // 4×4 tiles
	if parts, byN := split(kn, 2, 400, 6, 500); parts != 2 || byN {
		t.Errorf("400×6 C: split (%d, byN=%v), want 2 parts by rows", parts, byN)
	}
	if parts, byN := split(kn, 2, 6, 400, 500); parts != 2 || !byN {
		t.Errorf("6×400 C: split (%d, byN=%v), want 2 parts by columns", parts, byN)
	}
	if parts, _ := split(kn, 2, 10, 10, 10); parts != 1 {
		t.Errorf("10×10×10: split into %d parts, want 1 (below parMin)", parts)
	}
}

// The engine keeps products below its split minimum on one goroutine
// (DefaultSplitMin unless WithSplitMin says otherwise) and rejects a
// negative minimum.
func TestEngineSplitMin(t *testing.T) {
	e, err := New(WithThreads(2))
	if err != nil {
		t.Fatal(err)
	}
	if got := e.threadsFor(100, 784, 200); got != 1 {
		t.Errorf("default engine: 100×784×200 (15.7M multiply-adds) on %d goroutines, want 1", got)
	}
	if got := e.threadsFor(100, 784, 400); got != 2 {
		t.Errorf("default engine: 100×784×400 (31.4M multiply-adds) on %d goroutines, want 2", got)
	}
	if d := Default(); d.threadsFor(100, 200, 200) != 1 {
		t.Errorf("Default(): 100×200×200 split")
	}
	e, err = New(WithThreads(2), WithSplitMin(1<<20))
	if err != nil {
		t.Fatal(err)
	}
	if got := e.threadsFor(100, 200, 200); got != 2 {
		t.Errorf("WithSplitMin(1<<20): 100×200×200 on %d goroutines, want 2", got)
	}
	if _, err := New(WithSplitMin(-1)); err == nil {
		t.Error("WithSplitMin(-1) accepted")
	}
}
