package priors

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distmv"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// setParam copies vals into the parameter's tensor (float32 or float64).
func setParam(t *testing.T, p *layers.Param, vals []float64) {
	t.Helper()
	switch d := p.Value.Data().(type) {
	case []float64:
		if len(d) != len(vals) {
			t.Fatalf("%s: %d values, want %d", p.Name, len(vals), len(d))
		}
		copy(d, vals)
	case []float32:
		if len(d) != len(vals) {
			t.Fatalf("%s: %d values, want %d", p.Name, len(vals), len(d))
		}
		for i, v := range vals {
			d[i] = float32(v)
		}
	default:
		t.Fatalf("%s: unexpected data %T", p.Name, d)
	}
}

// mustValues returns the numbers of a tensor as float64.
func mustValues(t *testing.T, x *tensor.Dense) []float64 {
	t.Helper()
	v, err := values(x)
	if err != nil {
		t.Fatal(err)
	}
	return v
}

// randVals returns n values drawn as scale*N(0,1) + shift from a fixed seed.
func randVals(seed uint64, n int, scale, shift float64) []float64 {
	rng := rand.New(rand.NewPCG(seed, 7))
	out := make([]float64, n)
	for i := range out {
		out[i] = shift + scale*rng.NormFloat64()
	}
	return out
}

// inputNode returns an (r, c) input node of dtype dt holding vals.
func inputNode(g *G.ExprGraph, dt tensor.Dtype, vals []float64, r, c int, name string) *G.Node {
	return G.NewTensor(g, dt, 2, G.WithShape(r, c), G.WithName(name), G.WithValue(denseOf(dt, append([]float64(nil), vals...), r, c)))
}

// runLogProb evaluates p.LogProb on z (n rows) in a fresh graph.
func runLogProb(t *testing.T, p Prior, dt tensor.Dtype, z []float64, n int) []float64 {
	t.Helper()
	g := G.NewGraph()
	s := layers.NewScope(g)
	zn := inputNode(g, dt, z, n, p.Dim(), "z")
	lp, err := p.LogProb(s, zn)
	if err != nil {
		t.Fatal(err)
	}
	if !lp.Shape().Eq(tensor.Shape{n}) {
		t.Fatalf("LogProb shape %v, want (%d)", lp.Shape(), n)
	}
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		t.Fatal(err)
	}
	return mustValues(t, lp.Value().(*tensor.Dense))
}

// gonumNormal returns the gonum diagonal Gaussian N(mu, diag(exp(lv))).
func gonumNormal(t *testing.T, mu, lv []float64) *distmv.Normal {
	t.Helper()
	d := len(mu)
	cov := mat.NewSymDense(d, nil)
	for i := 0; i < d; i++ {
		cov.SetSym(i, i, math.Exp(lv[i]))
	}
	n, ok := distmv.NewNormal(mu, cov, nil)
	if !ok {
		t.Fatalf("gonum NewNormal rejected covariance %v", lv)
	}
	return n
}

// closeRel reports whether a and b agree within tol relative to max(1, |b|).
func closeRel(a, b, tol float64) bool {
	return math.Abs(a-b) <= tol*math.Max(1, math.Abs(b))
}

// checkMoments compares the per-column sample mean and variance of x (n, d)
// with the analytic ones. The tolerance is 5 standard errors estimated from
// the sample itself: sqrt(var/n) for the mean and sqrt((m4 - var^2)/n) for
// the variance (common practice; 5 sigma makes a false failure at a fixed
// seed essentially impossible, while a wrong weight, mean or scale in the
// tested settings moves a moment by many standard errors).
func checkMoments(t *testing.T, x []float64, n, d int, wantMean, wantVar []float64) {
	t.Helper()
	for j := 0; j < d; j++ {
		var m float64
		for i := 0; i < n; i++ {
			m += x[i*d+j]
		}
		m /= float64(n)
		var m2, m4 float64
		for i := 0; i < n; i++ {
			c := x[i*d+j] - m
			m2 += c * c
			m4 += c * c * c * c
		}
		m2 /= float64(n)
		m4 /= float64(n)
		seMean := math.Sqrt(m2 / float64(n))
		seVar := math.Sqrt((m4 - m2*m2) / float64(n))
		if math.Abs(m-wantMean[j]) > 5*seMean {
			t.Errorf("dim %d: sample mean %.5f, want %.5f (5 se = %.5f)", j, m, wantMean[j], 5*seMean)
		}
		if math.Abs(m2-wantVar[j]) > 5*seVar {
			t.Errorf("dim %d: sample variance %.5f, want %.5f (5 se = %.5f)", j, m2, wantVar[j], 5*seVar)
		}
	}
}

// mixtureMoments returns the per-dimension mean and variance of a diagonal
// Gaussian mixture: mean = sum_k w_k mu_k and, by the law of total
// variance, var = sum_k w_k (s_k + mu_k^2) - mean^2 (common knowledge).
func mixtureMoments(w, mu, lv []float64, d int) (mean, variance []float64) {
	mean = make([]float64, d)
	second := make([]float64, d)
	for k, wk := range w {
		for j := 0; j < d; j++ {
			m := mu[k*d+j]
			mean[j] += wk * m
			second[j] += wk * (math.Exp(lv[k*d+j]) + m*m)
		}
	}
	variance = make([]float64, d)
	for j := range variance {
		variance[j] = second[j] - mean[j]*mean[j]
	}
	return mean, variance
}

// newRNG returns a PCG generator with a fixed seed.
func newRNG(seed uint64) *rand.Rand { return rand.New(rand.NewPCG(seed, 99)) }
