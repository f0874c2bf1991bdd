package priors

import (
	"math"
	"testing"

	"gorgonia.org/tensor"
)

// samples draws n rows from p and checks shape and dtype.
func samples(t *testing.T, p Prior, dt tensor.Dtype, seed uint64, n int) []float64 {
	t.Helper()
	x, err := p.Sample(newRNG(seed), n)
	if err != nil {
		t.Fatal(err)
	}
	if !x.Shape().Eq(tensor.Shape{n, p.Dim()}) || x.Dtype() != dt {
		t.Fatalf("Sample: shape %v dtype %v, want (%d, %d) %v", x.Shape(), x.Dtype(), n, p.Dim(), dt)
	}
	return mustValues(t, x)
}

// 20000 draws give standard errors of about 1% of a unit variance; see
// checkMoments for the 5-standard-error tolerance.
const momentDraws = 20000

func TestStandardNormalSampleMoments(t *testing.T) {
	p, err := NewStandardNormal(3, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	x := samples(t, p, tensor.Float64, 1, momentDraws)
	// reference: N(0, I) has mean 0 and variance 1 (definition).
	checkMoments(t, x, momentDraws, 3, []float64{0, 0, 0}, []float64{1, 1, 1})
}

func TestDiagonalSampleMoments(t *testing.T) {
	p, err := NewDiagonal("prior", 2, tensor.Float32)
	if err != nil {
		t.Fatal(err)
	}
	m, v := []float64{1.5, -2}, []float64{-1, 0.8}
	setParam(t, p.Params()[0], m)
	setParam(t, p.Params()[1], v)
	x := samples(t, p, tensor.Float32, 2, momentDraws)
	// reference: N(m, diag(exp(v))) has mean m and variance exp(v) (definition).
	checkMoments(t, x, momentDraws, 2, m, []float64{math.Exp(v[0]), math.Exp(v[1])})
}

func TestMixtureSampleMoments(t *testing.T) {
	p := newTestMixture(t, tensor.Float64)
	w, err := p.Weights()
	if err != nil {
		t.Fatal(err)
	}
	x := samples(t, p, tensor.Float64, 3, momentDraws)
	mean, variance := mixtureMoments(w, mixMeans, mixLogVars, 2) // law of total variance
	checkMoments(t, x, momentDraws, 2, mean, variance)
}

func TestVampSampleMoments(t *testing.T) {
	p, enc, head := newTestVamp(t, tensor.Float64)
	mu, lv := encodePseudo(t, p, enc, head, []int{3})
	x := samples(t, p, tensor.Float64, 4, momentDraws)
	w := []float64{1.0 / 3, 1.0 / 3, 1.0 / 3}
	mean, variance := mixtureMoments(w, mu, lv, 2) // law of total variance
	checkMoments(t, x, momentDraws, 2, mean, variance)
}

func TestSampleRepeatable(t *testing.T) {
	p := newTestMixture(t, tensor.Float64)
	a := samples(t, p, tensor.Float64, 7, 50)
	b := samples(t, p, tensor.Float64, 7, 50)
	c := samples(t, p, tensor.Float64, 8, 50)
	same, differ := true, false
	for i := range a {
		same = same && a[i] == b[i]
		differ = differ || a[i] != c[i]
	}
	if !same {
		t.Error("same seed gave different draws")
	}
	if !differ {
		t.Error("different seeds gave the same draws")
	}
}

func TestMixtureInitSpread(t *testing.T) {
	// The documented initialisation: means are N(0, Spread^2) draws, so the
	// components differ and the seed decides them.
	a, err := NewMixture("m", 4, 3, MixtureOptions{Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	b, err := NewMixture("m", 4, 3, MixtureOptions{Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	ma, mb := mustValues(t, a.Params()[1].Value), mustValues(t, b.Params()[1].Value)
	for i := range ma {
		if ma[i] != mb[i] {
			t.Fatal("same seed gave different initial means")
		}
	}
	for k := 1; k < 4; k++ {
		if ma[k*3] == ma[0] && ma[k*3+1] == ma[1] && ma[k*3+2] == ma[2] {
			t.Errorf("component %d starts equal to component 0", k)
		}
	}
	w, err := a.Weights()
	if err != nil {
		t.Fatal(err)
	}
	for k, v := range w {
		if math.Abs(v-0.25) > 1e-12 {
			t.Errorf("initial weight %d = %v, want 1/4", k, v)
		}
	}
}
