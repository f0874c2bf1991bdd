package priors

import (
	"math"
	"testing"

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

// TestMonteCarloKLAgrees checks the estimator the trainer uses for priors
// without a closed form, (1/S) sum_s [log q(z_s) - log p(z_s)] with
// z_s ~ q, against the closed form: it is unbiased, so with S draws it lies
// within a few standard errors of the exact value. The tolerance is 5
// standard errors of the estimate, taken from the sample (common practice).
func TestMonteCarloKLAgrees(t *testing.T) {
	const d, samples = 3, 40000
	mu := []float64{0.8, -0.4, 1.5}
	lv := []float64{-0.7, 0.4, 0.1}
	for _, c := range klCases {
		p, pm, pv := c.prior(t, tensor.Float64)
		exact := runKL(t, p, d, tensor.Float64, mu, lv, 1)[0]
		q := gonumNormal(t, mu, lv)
		ref := gonumNormal(t, pm, pv)
		rng := newRNG(31)
		z := make([]float64, d)
		var sum, sumSq float64
		for s := 0; s < samples; s++ {
			for j := range z {
				z[j] = mu[j] + math.Exp(0.5*lv[j])*rng.NormFloat64()
			}
			term := q.LogProb(z) - ref.LogProb(z) // reference: gonum stat/distmv Normal.LogProb
			sum += term
			sumSq += term * term
		}
		mean := sum / samples
		se := math.Sqrt((sumSq/samples - mean*mean) / samples)
		if math.Abs(mean-exact) > 5*se {
			t.Errorf("%s: Monte Carlo KL %.5f, closed form %.5f (5 se = %.5f)", c.name, mean, exact, 5*se)
		}
		if se > 0.05*exact {
			t.Errorf("%s: standard error %.5f too large to make the check meaningful", c.name, se)
		}
	}
}
