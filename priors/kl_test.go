package priors

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/stat/distmv"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// runKL evaluates p.KL for posteriors (mu, lv), n rows, and returns the
// per-row sums of the (N, D) result.
func runKL(t *testing.T, p ClosedFormKL, d int, dt tensor.Dtype, mu, lv []float64, n int) []float64 {
	t.Helper()
	g := G.NewGraph()
	s := layers.NewScope(g)
	muN := inputNode(g, dt, mu, n, d, "mu")
	lvN := inputNode(g, dt, lv, n, d, "lv")
	kl, err := p.KL(s, muN, lvN)
	if err != nil {
		t.Fatal(err)
	}
	if !kl.Shape().Eq(tensor.Shape{n, d}) {
		t.Fatalf("KL shape %v, want (%d, %d)", kl.Shape(), n, d)
	}
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		t.Fatal(err)
	}
	v := mustValues(t, kl.Value().(*tensor.Dense))
	out := make([]float64, n)
	for i := range out {
		for j := 0; j < d; j++ {
			out[i] += v[i*d+j]
		}
	}
	return out
}

// klCase returns the prior under test, its mean and log-variance.
type klCase struct {
	name   string
	prior  func(t *testing.T, dt tensor.Dtype) (ClosedFormKL, []float64, []float64)
	tolF32 float64
}

var klCases = []klCase{
	{"standard", func(t *testing.T, dt tensor.Dtype) (ClosedFormKL, []float64, []float64) {
		p, err := NewStandardNormal(3, dt)
		if err != nil {
			t.Fatal(err)
		}
		return p, make([]float64, 3), make([]float64, 3)
	}, 1e-4},
	{"diagonal", func(t *testing.T, dt tensor.Dtype) (ClosedFormKL, []float64, []float64) {
		p, err := NewDiagonal("prior", 3, dt)
		if err != nil {
			t.Fatal(err)
		}
		m, v := []float64{0.5, -1, 0.2}, []float64{0.3, -0.6, 1}
		setParam(t, p.Params()[0], m)
		setParam(t, p.Params()[1], v)
		return p, m, v
	}, 1e-4},
}

func TestClosedFormKL(t *testing.T) {
	const n, d = 4, 3
	mu := randVals(20, n*d, 1, 0)
	lv := randVals(21, n*d, 0.7, 0)
	for _, c := range klCases {
		for _, dt := range []tensor.Dtype{tensor.Float64, tensor.Float32} {
			p, pm, pv := c.prior(t, dt)
			got := runKL(t, p, d, dt, mu, lv, n)
			ref := gonumNormal(t, pm, pv)
			tol := 1e-12
			if dt == tensor.Float32 {
				tol = c.tolF32 // float32 rounding of a sum of a few O(1) terms
			}
			for i := 0; i < n; i++ {
				q := gonumNormal(t, mu[i*d:(i+1)*d], lv[i*d:(i+1)*d])
				want := distmv.KullbackLeibler{}.DistNormal(q, ref) // reference: gonum stat/distmv KullbackLeibler.DistNormal
				if !closeRel(got[i], want, tol) {
					t.Errorf("%s %v row %d: KL = %.12g, want %.12g", c.name, dt, i, got[i], want)
				}
			}
		}
	}
}

// hermiteExpect returns E[g(z)] for z ~ N(mu, diag(sigma^2)) by an
// n-point Gauss-Hermite rule in every dimension (nodes and weights from gonum
// integrate/quad Hermite, for int e^(-x^2) f(x) dx): E[g] = pi^(-D/2) sum
// w_i1...w_iD g(mu + sqrt(2) sigma x). It is exact for polynomials of degree
// below 2n in each coordinate and converges fast for smooth g such as a
// log-density.
func hermiteExpect(mu, sigma []float64, n int, g func(z []float64) float64) float64 {
	x := make([]float64, n)
	w := make([]float64, n)
	quad.Hermite{}.FixedLocations(x, w, math.Inf(-1), math.Inf(1))
	d := len(mu)
	z := make([]float64, d)
	idx := make([]int, d)
	var sum float64
	for {
		wt := 1.0
		for j, i := range idx {
			z[j] = mu[j] + math.Sqrt2*sigma[j]*x[i]
			wt *= w[i] / math.SqrtPi
		}
		sum += wt * g(z)
		j := 0
		for ; j < d; j++ {
			if idx[j]++; idx[j] < n {
				break
			}
			idx[j] = 0
		}
		if j == d {
			return sum
		}
	}
}

// mcKLCase is a prior with an independent reference of its log-density
// (gonum, no gorgonia graph) and, when known, a closed-form KL from q.
type mcKLCase struct {
	name  string
	prior Prior
	// logP is the reference log-density of one point.
	logP func(z []float64) float64
	// exact is the closed-form KL(q || p), or nil when there is none.
	exact func(q *distmv.Normal) float64
}

func mcKLCases(t *testing.T) []mcKLCase {
	t.Helper()
	var cases []mcKLCase
	std, err := NewStandardNormal(2, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	stdRef := gonumNormal(t, []float64{0, 0}, []float64{0, 0})
	cases = append(cases, mcKLCase{"standard", std, stdRef.LogProb, func(q *distmv.Normal) float64 {
		return distmv.KullbackLeibler{}.DistNormal(q, stdRef) // reference: gonum stat/distmv KullbackLeibler.DistNormal
	}})

	diag, err := NewDiagonal("prior", 2, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	dm, dv := []float64{0.5, -1}, []float64{0.3, -0.6}
	setParam(t, diag.Params()[0], dm)
	setParam(t, diag.Params()[1], dv)
	diagRef := gonumNormal(t, dm, dv)
	cases = append(cases, mcKLCase{"diagonal", diag, diagRef.LogProb, func(q *distmv.Normal) float64 {
		return distmv.KullbackLeibler{}.DistNormal(q, diagRef) // reference: gonum stat/distmv KullbackLeibler.DistNormal
	}})

	// The mixture: log w = logits - logsumexp(logits) by the documented
	// parametrisation w = softmax(logits), computed here with gonum floats.
	mix := newTestMixture(t, tensor.Float64)
	logW := make([]float64, len(mixLogits))
	for k, l := range mixLogits {
		logW[k] = l - floats.LogSumExp(mixLogits)
	}
	cases = append(cases, mcKLCase{"mixture", mix, func(z []float64) float64 {
		return mixtureReference(t, logW, mixMeans, mixLogVars, z, 2)[0]
	}, nil})

	// The VampPrior with image-shaped pseudo-inputs (1, 4, 4) and an ELU
	// first in the encoder, with the graph-free reference of vamp_image_test.go.
	c := vampImageCases(t)[0]
	head, err := layers.NewGaussianHead("head", c.width, 2, layers.Options{Dtype: tensor.Float64, Seed: 22})
	if err != nil {
		t.Fatal(err)
	}
	vamp, err := NewVamp("vamp", 3, c.shape, c.enc, head, VampOptions{Dtype: tensor.Float64, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	u := randVals(36, 3*16, 1, 0)
	setParam(t, vamp.Params()[0], u)
	cases = append(cases, mcKLCase{"vamp", vamp, func(z []float64) float64 {
		return vampRef(t, c, head, u, 3, 16, z, 2)[0]
	}, nil})
	return cases
}

// TestMonteCarloKLOfPriors checks the Monte Carlo KL estimate that a
// trainer forms from a prior, (1/S) sum_s [log q(z_s) - log p(z_s)] with
// z_s ~ q and log p(z_s) from the prior's own LogProb graph, against the
// exact KL(q || p): gonum's closed form for the Gaussian priors, and for
// the mixture and the VampPrior (no closed form) a 40-point-per-dimension
// Gauss-Hermite quadrature of E_q[log q - log p] with the gonum reference
// density. The estimate is unbiased, so it must lie within 5 standard
// errors of the exact value; the standard error is taken from the same
// quadrature (the exact variance of one term), not from the sample (common
// practice; 5 sigma keeps a false failure at a fixed seed out of reach,
// and the check below that the standard error is small makes it sharp).
func TestMonteCarloKLOfPriors(t *testing.T) {
	const d, samples = 2, 20000
	mu := []float64{0.8, -0.4}
	lv := []float64{-0.7, 0.4}
	sigma := []float64{math.Exp(0.5 * lv[0]), math.Exp(0.5 * lv[1])}
	q := gonumNormal(t, mu, lv)
	rng := newRNG(31)
	z := make([]float64, samples*d)
	for i := range z {
		z[i] = mu[i%d] + sigma[i%d]*rng.NormFloat64()
	}
	cases := mcKLCases(t)
	for _, c := range cases {
		term := func(z []float64) float64 { return q.LogProb(z) - c.logP(z) }
		quadKL := hermiteExpect(mu, sigma, 40, term)
		second := hermiteExpect(mu, sigma, 40, func(z []float64) float64 { v := term(z); return v * v })
		exact := quadKL
		if c.exact != nil {
			exact = c.exact(q)
			// The quadrature agrees with the closed form, so it is a sound
			// reference where there is none.
			if !closeRel(quadKL, exact, 1e-9) {
				t.Errorf("%s: quadrature KL %.12g, closed form %.12g", c.name, quadKL, exact)
			}
		}
		se := math.Sqrt((second - quadKL*quadKL) / samples)

		lp := runLogProb(t, c.prior, tensor.Float64, z, samples) // the prior's LogProb graph
		var sum float64
		for s := range samples {
			sum += q.LogProb(z[s*d:(s+1)*d]) - lp[s] // log q: gonum stat/distmv Normal.LogProb
		}
		est := sum / samples
		if math.Abs(est-exact) > 5*se {
			t.Errorf("%s: Monte Carlo KL %.5f, exact %.5f (5 se = %.5f)", c.name, est, exact, 5*se)
		}
		if se > 0.02*exact {
			t.Errorf("%s: standard error %.5f is too large for KL %.5f to make the check sharp", c.name, se, exact)
		}
		// The same draws against a wrong density, the standard normal, must
		// miss: the check has the power to see a wrong prior density.
		t.Logf("%s: Monte Carlo %.5f, exact %.5f, se %.5f", c.name, est, exact, se)
		if c.name != "standard" {
			var wrong float64
			for s := range samples {
				wrong += q.LogProb(z[s*d:(s+1)*d]) - cases[0].logP(z[s*d:(s+1)*d])
			}
			if math.Abs(wrong/samples-exact) <= 5*se {
				t.Errorf("%s: the standard normal's estimate %.5f is within 5 se of %.5f; the check is too weak", c.name, wrong/samples, exact)
			}
		}
	}
}
