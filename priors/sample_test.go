package priors

import (
	"math"
	"slices"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"
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
	// The weights the test set, by the documented parametrisation
	// w = softmax(logits): w_k = exp(l_k - logsumexp(l)), with gonum floats
	// (not the prior's own Weights).
	w := make([]float64, len(mixLogits))
	for k, l := range mixLogits {
		w[k] = math.Exp(l - floats.LogSumExp(mixLogits))
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
	// The documented initialisation: means are independent N(0, Spread^2)
	// draws decided by the seed, log-variances and logits are zero (so the
	// weights start equal).
	a, err := NewMixture("m", 4, 3, MixtureOptions{Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	b, err := NewMixture("m", 4, 3, MixtureOptions{Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	c, err := NewMixture("m", 4, 3, MixtureOptions{Seed: 2})
	if err != nil {
		t.Fatal(err)
	}
	ma, mb, mc := mustValues(t, a.Params()[1].Value), mustValues(t, b.Params()[1].Value), mustValues(t, c.Params()[1].Value)
	if !slices.Equal(ma, mb) {
		t.Fatal("same seed gave different initial means")
	}
	if slices.Equal(ma, mc) {
		t.Fatal("different seeds gave the same initial means")
	}
	for k := 1; k < 4; k++ {
		if slices.Equal(ma[k*3:k*3+3], ma[0:3]) {
			t.Errorf("component %d starts equal to component 0", k)
		}
	}
	for _, i := range []int{0, 2} { // logits and log-variances
		for j, v := range mustValues(t, a.Params()[i].Value) {
			if v != 0 {
				t.Errorf("%s[%d] = %v, want 0", a.Params()[i].Name, j, v)
			}
		}
	}

	// The spread: 600 x 10 = 6000 initial means, with the default spread and
	// with Spread 1.7, must look like N(0, spread^2) draws.
	for _, spread := range []float64{0, 1.7} {
		want := spread
		if spread == 0 {
			want = DefaultSpread
		}
		p, err := NewMixture("m", 600, 10, MixtureOptions{Seed: 3, Spread: spread, Dtype: tensor.Float64})
		if err != nil {
			t.Fatal(err)
		}
		m := mustValues(t, p.Params()[1].Value)
		n := float64(len(m))
		// Moments: sample mean and variance within 5 standard errors of 0
		// and spread^2 (for normal draws the variance of the sample variance
		// is 2 sigma^4 / n; textbook, from memory). A spread off by 10%
		// moves the variance by about 11 standard errors.
		mean, variance := stat.PopMeanVariance(m, nil) // gonum stat
		if se := want / math.Sqrt(n); math.Abs(mean) > 5*se {
			t.Errorf("spread %v: mean of the initial means %.4f, want 0 (5 se = %.4f)", spread, mean, 5*se)
		}
		if se := want * want * math.Sqrt(2/n); math.Abs(variance-want*want) > 5*se {
			t.Errorf("spread %v: variance of the initial means %.4f, want %.4f (5 se = %.4f)", spread, variance, want*want, 5*se)
		}
		// Shape: the one-sample Kolmogorov-Smirnov distance to the
		// N(0, spread^2) CDF of gonum stat/distuv, below the asymptotic 1%
		// critical value 1.628/sqrt(n) (Kolmogorov distribution; from memory).
		sorted := slices.Clone(m)
		slices.Sort(sorted)
		ref := distuv.Normal{Mu: 0, Sigma: want}
		var ks float64
		for i, v := range sorted {
			f := ref.CDF(v)
			ks = math.Max(ks, math.Max(math.Abs(float64(i+1)/n-f), math.Abs(f-float64(i)/n)))
		}
		if crit := 1.628 / math.Sqrt(n); ks > crit {
			t.Errorf("spread %v: Kolmogorov-Smirnov distance %.4f to N(0, %v^2) exceeds %.4f", spread, ks, want, crit)
		}
	}
}
