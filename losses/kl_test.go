package losses_test

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distmv"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// diagNormal returns a gonum multivariate normal with mean mu and diagonal
// covariance exp(logVar).
func diagNormal(t *testing.T, mu, logVar []float64) *distmv.Normal {
	t.Helper()
	cov := mat.NewSymDense(len(mu), nil)
	for i, lv := range logVar {
		cov.SetSym(i, i, math.Exp(lv))
	}
	n, ok := distmv.NewNormal(mu, cov, nil)
	if !ok {
		t.Fatalf("distmv.NewNormal: covariance not positive definite")
	}
	return n
}

// klRef returns, per row, the per-dimension and per-sample KL between
// diagonal Gaussians from gonum: each dimension as a 1-D distmv.Normal and
// the whole row as a D-dimensional one. Row r of (mu2, lv2) is used for row
// r of (mu1, lv1), or row 0 when rows2 = 1.
func klRef(t *testing.T, n, d, rows2 int, mu1, lv1, mu2, lv2 []float64) (perDim, perSample []float64) {
	t.Helper()
	var kl distmv.KullbackLeibler
	for r := 0; r < n; r++ {
		r2 := r
		if rows2 == 1 {
			r2 = 0
		}
		a, b := mu1[r*d:(r+1)*d], lv1[r*d:(r+1)*d]
		c, e := mu2[r2*d:(r2+1)*d], lv2[r2*d:(r2+1)*d]
		for j := 0; j < d; j++ {
			// reference: gonum stat/distmv KullbackLeibler.DistNormal, 1-D
			perDim = append(perDim, kl.DistNormal(diagNormal(t, a[j:j+1], b[j:j+1]), diagNormal(t, c[j:j+1], e[j:j+1])))
		}
		// reference: gonum stat/distmv KullbackLeibler.DistNormal, D-dim
		perSample = append(perSample, kl.DistNormal(diagNormal(t, a, b), diagNormal(t, c, e)))
	}
	return perDim, perSample
}

// evalKL builds kl, PerSample and BatchTotal and returns their values.
func evalKL(t *testing.T, dt tensor.Dtype, build func(g *G.ExprGraph) (*G.Node, error)) (perDim, perSample []float64, total float64) {
	t.Helper()
	g := G.NewGraph()
	k, err := build(g)
	if err != nil {
		t.Fatal(err)
	}
	ps, err := losses.PerSample(k)
	if err != nil {
		t.Fatal(err)
	}
	tot, err := losses.BatchTotal(ps)
	if err != nil {
		t.Fatal(err)
	}
	kw, psw, totw := watch(k), watch(ps), watch(tot)
	run(t, g)
	return values(t, kw), values(t, psw), values(t, totw)[0]
}

func sum(x []float64) float64 {
	s := 0.0
	for _, v := range x {
		s += v
	}
	return s
}

// Tolerance: 1e-9 relative (absolute floor 1e-12 for values near 0, where
// both sides are differences of nearly equal numbers). float32 runs use
// 1e-4: single precision carries about 7 digits and the terms cancel.
func klTol(dt tensor.Dtype) float64 {
	if dt == tensor.Float32 {
		return 1e-4
	}
	return 1e-9
}

func TestKLDiagonalMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	const n = 3
	for _, dt := range dtypes {
		for _, d := range []int{1, 2, 3, 8, 64} {
			for _, rows2 := range []int{n, 1} {
				mu1, lv1 := randn(rng, n*d, 1), uniform(rng, n*d, -2, 2)
				mu2, lv2 := randn(rng, rows2*d, 1), uniform(rng, rows2*d, -2, 2)
				if dt == tensor.Float32 {
					round32(mu1, lv1, mu2, lv2)
				}
				tol, floor := klTol(dt), 1e-12
				if dt == tensor.Float32 {
					floor = 1e-3
				}
				// Forward direction: KL(q1 || q2).
				pd, ps, tot := evalKL(t, dt, func(g *G.ExprGraph) (*G.Node, error) {
					return losses.KLDiagonal(input(g, dt, "mu1", n, d, mu1), input(g, dt, "lv1", n, d, lv1),
						input(g, dt, "mu2", rows2, d, mu2), input(g, dt, "lv2", rows2, d, lv2))
				})
				wantPD, wantPS := klRef(t, n, d, rows2, mu1, lv1, mu2, lv2)
				checkAll(t, "KL(q1||q2) per dim", pd, wantPD, tol, floor)
				checkAll(t, "KL(q1||q2) per sample", ps, wantPS, tol, floor)
				checkAll(t, "KL(q1||q2) total", []float64{tot}, []float64{sum(wantPS)}, tol, floor)

				if rows2 != n {
					continue
				}
				// Reverse direction: KL(q2 || q1); KL is not symmetric.
				pd, ps, tot = evalKL(t, dt, func(g *G.ExprGraph) (*G.Node, error) {
					return losses.KLDiagonal(input(g, dt, "mu2", n, d, mu2), input(g, dt, "lv2", n, d, lv2),
						input(g, dt, "mu1", n, d, mu1), input(g, dt, "lv1", n, d, lv1))
				})
				wantPD, wantPS = klRef(t, n, d, n, mu2, lv2, mu1, lv1)
				checkAll(t, "KL(q2||q1) per dim", pd, wantPD, tol, floor)
				checkAll(t, "KL(q2||q1) per sample", ps, wantPS, tol, floor)
				checkAll(t, "KL(q2||q1) total", []float64{tot}, []float64{sum(wantPS)}, tol, floor)
			}
		}
	}
}

func TestKLStandardNormalMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	const n = 4
	for _, dt := range dtypes {
		for _, d := range []int{1, 2, 3, 8, 64} {
			mu, lv := randn(rng, n*d, 1), uniform(rng, n*d, -3, 2)
			if dt == tensor.Float32 {
				round32(mu, lv)
			}
			pd, ps, tot := evalKL(t, dt, func(g *G.ExprGraph) (*G.Node, error) {
				return losses.KLStandardNormal(input(g, dt, "mu", n, d, mu), input(g, dt, "lv", n, d, lv))
			})
			zeros := make([]float64, d)
			wantPD, wantPS := klRef(t, n, d, 1, mu, lv, zeros, zeros) // N(0, I): mean 0, log variance 0
			floor := 1e-12
			if dt == tensor.Float32 {
				floor = 1e-3
			}
			checkAll(t, "KL(q||N(0,I)) per dim", pd, wantPD, klTol(dt), floor)
			checkAll(t, "KL(q||N(0,I)) per sample", ps, wantPS, klTol(dt), floor)
			checkAll(t, "KL(q||N(0,I)) total", []float64{tot}, []float64{sum(wantPS)}, klTol(dt), floor)
		}
	}
}

// round32 rounds every value to float32 so that float32 graphs and the
// float64 reference see the same inputs.
func round32(xs ...[]float64) {
	for _, x := range xs {
		for i, v := range x {
			x[i] = float64(float32(v))
		}
	}
}

// klDiagPlain is KL(N(m1, e^a) || N(m2, e^b)) in one dimension, written
// from the textbook formula (from memory; checked against gonum above).
func klDiagPlain(m1, a, m2, b float64) float64 {
	return 0.5 * (b - a + (math.Exp(a)+(m1-m2)*(m1-m2))/math.Exp(b) - 1)
}

func TestKLGradients(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	const n, d = 3, 4
	mu, lv := randn(rng, n*d, 1), uniform(rng, n*d, -2, 2)
	gradCheck(t, "KLStandardNormal", []arg{{"mu", n, d, mu}, {"lv", n, d, lv}},
		func(in []*G.Node) (*G.Node, error) { return losses.KLStandardNormal(in[0], in[1]) },
		func(in [][]float64) []float64 {
			out := make([]float64, n*d)
			for i := range out {
				out[i] = klDiagPlain(in[0][i], in[1][i], 0, 0)
			}
			return out
		})
	for _, rows2 := range []int{n, 1} {
		mu2, lv2 := randn(rng, rows2*d, 1), uniform(rng, rows2*d, -2, 2)
		gradCheck(t, "KLDiagonal", []arg{{"mu1", n, d, mu}, {"lv1", n, d, lv}, {"mu2", rows2, d, mu2}, {"lv2", rows2, d, lv2}},
			func(in []*G.Node) (*G.Node, error) {
				k, err := losses.KLDiagonal(in[0], in[1], in[2], in[3])
				if err != nil {
					return nil, err
				}
				return losses.PerSample(k)
			},
			func(in [][]float64) []float64 {
				out := make([]float64, n)
				for i := 0; i < n*d; i++ {
					j := i
					if rows2 == 1 {
						j = i % d
					}
					out[i/d] += klDiagPlain(in[0][i], in[1][i], in[2][j], in[3][j])
				}
				return out
			})
	}
	gradCheck(t, "BatchTotal", []arg{{"x", n, d, mu}},
		func(in []*G.Node) (*G.Node, error) { return losses.BatchTotal(in[0]) },
		func(in [][]float64) []float64 { return []float64{sum(in[0])} })
}

func TestKLBadInput(t *testing.T) {
	g := G.NewGraph()
	m := input(g, tensor.Float64, "m", 2, 3, make([]float64, 6))
	m32 := input(g, tensor.Float32, "m32", 2, 3, make([]float64, 6))
	wrong := input(g, tensor.Float64, "wrong", 2, 4, make([]float64, 8))
	row := input(g, tensor.Float64, "row", 1, 3, make([]float64, 3))
	vec := G.NewVector(g, tensor.Float64, G.WithShape(3), G.WithName("vec"), G.WithValue(tensor.New(tensor.WithBacking([]float64{0, 0, 0}))))
	ints := G.NewMatrix(g, tensor.Int, G.WithShape(2, 3), G.WithName("ints"), G.WithValue(tensor.New(tensor.WithShape(2, 3), tensor.WithBacking(make([]int, 6)))))
	cases := []struct {
		name string
		arg  string
		call func() (*G.Node, error)
	}{
		{"KLStandardNormal nil mu", "mu", func() (*G.Node, error) { return losses.KLStandardNormal(nil, m) }},
		{"KLStandardNormal nil logVar", "logVar", func() (*G.Node, error) { return losses.KLStandardNormal(m, nil) }},
		{"KLStandardNormal shape", "logVar", func() (*G.Node, error) { return losses.KLStandardNormal(m, wrong) }},
		{"KLStandardNormal row logVar", "logVar", func() (*G.Node, error) { return losses.KLStandardNormal(m, row) }},
		{"KLStandardNormal vector", "mu", func() (*G.Node, error) { return losses.KLStandardNormal(vec, vec) }},
		{"KLStandardNormal dtype", "logVar", func() (*G.Node, error) { return losses.KLStandardNormal(m, m32) }},
		{"KLStandardNormal int", "mu", func() (*G.Node, error) { return losses.KLStandardNormal(ints, ints) }},
		{"KLDiagonal nil mu1", "mu1", func() (*G.Node, error) { return losses.KLDiagonal(nil, m, m, m) }},
		{"KLDiagonal nil logVar1", "logVar1", func() (*G.Node, error) { return losses.KLDiagonal(m, nil, m, m) }},
		{"KLDiagonal nil mu2", "mu2", func() (*G.Node, error) { return losses.KLDiagonal(m, m, nil, m) }},
		{"KLDiagonal nil logVar2", "logVar2", func() (*G.Node, error) { return losses.KLDiagonal(m, m, m, nil) }},
		{"KLDiagonal shape logVar1", "logVar1", func() (*G.Node, error) { return losses.KLDiagonal(m, row, m, m) }},
		{"KLDiagonal shape mu2", "mu2", func() (*G.Node, error) { return losses.KLDiagonal(m, m, wrong, m) }},
		{"KLDiagonal shape logVar2", "logVar2", func() (*G.Node, error) { return losses.KLDiagonal(m, m, m, wrong) }},
		{"KLDiagonal dtype mu2", "mu2", func() (*G.Node, error) { return losses.KLDiagonal(m, m, m32, m) }},
		{"PerSample nil", "perDim", func() (*G.Node, error) { return losses.PerSample(nil) }},
		{"PerSample vector", "perDim", func() (*G.Node, error) { return losses.PerSample(vec) }},
		{"BatchTotal nil", "x", func() (*G.Node, error) { return losses.BatchTotal(nil) }},
		{"BatchTotal int", "x", func() (*G.Node, error) { return losses.BatchTotal(ints) }},
	}
	checkBad(t, cases)
}

// checkBad runs calls that must fail with an error that wraps
// layers.ErrInvalidArgument and names the argument, and never panic.
func checkBad(t *testing.T, cases []struct {
	name string
	arg  string
	call func() (*G.Node, error)
}) {
	t.Helper()
	for _, c := range cases {
		func() {
			defer func() {
				if r := recover(); r != nil {
					t.Errorf("%s: panic: %v", c.name, r)
				}
			}()
			n, err := c.call()
			if err == nil {
				t.Errorf("%s: no error (node %v)", c.name, n)
				return
			}
			if !errors.Is(err, layers.ErrInvalidArgument) {
				t.Errorf("%s: error %q does not wrap layers.ErrInvalidArgument", c.name, err)
			}
			if !containsWord(err.Error(), c.arg) {
				t.Errorf("%s: error %q does not name %q", c.name, err, c.arg)
			}
		}()
	}
}

// containsWord reports whether s contains arg followed by ':' (how the
// package names arguments).
func containsWord(s, arg string) bool {
	for i := 0; i+len(arg) < len(s); i++ {
		if s[i:i+len(arg)] == arg && s[i+len(arg)] == ':' && (i == 0 || s[i-1] == ' ') {
			return true
		}
	}
	return false
}
