package layers

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distmv"
	"gonum.org/v1/gonum/stat/distuv"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// sample runs Reparameterize for mu and logVar of shape (n, d) with k
// samples per record, eps drawn with seed, and returns z row-major and eps.
func sample(t *testing.T, mu, logVar []float64, n, d, k int, seed uint64) (z, eps []float64) {
	t.Helper()
	g := G.NewGraph()
	mun := input(g, "mu", tensor.New(tensor.WithShape(n, d), tensor.WithBacking(append([]float64(nil), mu...))))
	lvn := input(g, "logVar", tensor.New(tensor.WithShape(n, d), tensor.WithBacking(append([]float64(nil), logVar...))))
	epsT := tensor.New(tensor.Of(tensor.Float64), tensor.WithShape(k*n, d))
	if err := FillNormal(rand.New(rand.NewPCG(seed, 1)), epsT); err != nil {
		t.Fatal(err)
	}
	zn, err := Reparameterize(mun, lvn, input(g, "eps", epsT))
	if err != nil {
		t.Fatal(err)
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	if err := m.RunAll(); err != nil {
		t.Fatal(err)
	}
	return toF64(zn.Value().Data()), epsT.Data().([]float64)
}

func TestReparameterizeMoments(t *testing.T) {
	// Distinct mu and sigma per cell also check the row layout: sample k of
	// record r is row k*N + r.
	const n, d, k = 2, 3, 20000
	mu := []float64{0.5, -1, 2, 0, 3, -0.25}
	logVar := []float64{0, -2, 1, 0.5, -4, 2}
	z, _ := sample(t, mu, logVar, n, d, k, 42)
	for r := 0; r < n; r++ {
		for j := 0; j < d; j++ {
			xs := make([]float64, k)
			for s := 0; s < k; s++ {
				xs[s] = z[(s*n+r)*d+j]
			}
			mean, variance := stat.MeanVariance(xs, nil)
			sigma2 := math.Exp(logVar[r*d+j])
			// Tolerance: 5 standard errors. The sample mean of K normal
			// draws has standard error sigma/sqrt(K); the sample variance
			// has standard error sigma^2*sqrt(2/(K-1)) (normal theory). A
			// correct sampler fails a 5-SE check with probability < 1e-6
			// per check, while a wrong scale (e.g. exp(logVar) instead of
			// exp(logVar/2)) misses by hundreds of SEs. The seed is fixed,
			// so the outcome is repeatable.
			if se := math.Sqrt(sigma2 / k); math.Abs(mean-mu[r*d+j]) > 5*se {
				t.Errorf("z[%d,%d]: mean %v, want %v (se %v)", r, j, mean, mu[r*d+j], se)
			}
			if se := sigma2 * math.Sqrt(2.0/(k-1)); math.Abs(variance-sigma2) > 5*se {
				t.Errorf("z[%d,%d]: variance %v, want %v (se %v)", r, j, variance, sigma2, se)
			}
		}
	}
}

func TestReparameterizeMonteCarloKL(t *testing.T) {
	const d, k = 3, 20000
	mu := []float64{0.7, -1.2, 0.1}
	logVar := []float64{-0.5, 0.8, -1.5}
	z, _ := sample(t, mu, logVar, 1, d, k, 7)
	std := distuv.Normal{Mu: 0, Sigma: 1}
	diffs := make([]float64, k)
	for s := 0; s < k; s++ {
		var lq, lp float64
		for j := 0; j < d; j++ {
			// reference: gonum distuv.Normal LogProb for q and p.
			q := distuv.Normal{Mu: mu[j], Sigma: math.Exp(logVar[j] / 2)}
			lq += q.LogProb(z[s*d+j])
			lp += std.LogProb(z[s*d+j])
		}
		diffs[s] = lq - lp
	}
	mc, sd := stat.MeanStdDev(diffs, nil)

	// reference: gonum stat/distmv KullbackLeibler.DistNormal closed form.
	cov := mat.NewSymDense(d, nil)
	for j := 0; j < d; j++ {
		cov.SetSym(j, j, math.Exp(logVar[j]))
	}
	q, ok := distmv.NewNormal(mu, cov, nil)
	if !ok {
		t.Fatal("q covariance not positive definite")
	}
	p, _ := distmv.NewNormal(make([]float64, d), eye(d), nil)
	exact := distmv.KullbackLeibler{}.DistNormal(q, p)
	// Tolerance: 5 standard errors of the Monte Carlo mean, sd/sqrt(K)
	// (about 0.01 here), estimated from the same samples.
	if se := sd / math.Sqrt(k); math.Abs(mc-exact) > 5*se {
		t.Errorf("Monte Carlo KL %v, closed form %v (se %v)", mc, exact, se)
	}
}

func eye(d int) *mat.SymDense {
	m := mat.NewSymDense(d, nil)
	for i := 0; i < d; i++ {
		m.SetSym(i, i, 1)
	}
	return m
}

func TestReparameterizeGradients(t *testing.T) {
	// K = 3 samples of N = 2 records, D = 2; loss = sum(R * z).
	const n, d, k = 2, 2, 3
	muT := randTensor(81, 1, n, d)
	lvT := randTensor(82, 1, n, d)
	epsT := randTensor(83, 1.5, k*n, d)
	R := randTensor(84, 1, k*n, d)
	g := G.NewGraph()
	mun, lvn := input(g, "mu", muT), input(g, "logVar", lvT)
	z, err := Reparameterize(mun, lvn, input(g, "eps", epsT))
	if err != nil {
		t.Fatal(err)
	}
	loss := G.Must(G.Sum(G.Must(G.HadamardProd(input(g, "R", R), z))))
	if _, err := G.Grad(loss, mun, lvn); err != nil {
		t.Fatal(err)
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	run := func() float64 {
		m.Reset()
		if err := m.RunAll(); err != nil {
			t.Fatal(err)
		}
		return loss.Value().Data().(float64)
	}
	run()
	gmu, _ := mun.Grad()
	glv, _ := lvn.Grad()
	gotMu := append([]float64(nil), gmu.Data().([]float64)...)
	gotLv := append([]float64(nil), glv.Data().([]float64)...)

	// Analytic derivative of z = mu + exp(logVar/2) eps (Kingma and Welling
	// 2014, sec. 2.4): dL/dmu[r,j] = sum_s R[s*N+r, j];
	// dL/dlogVar[r,j] = sum_s R[s*N+r, j] * eps[s*N+r, j] * exp(logVar/2)/2.
	mu, lv, eps, rr := muT.Data().([]float64), lvT.Data().([]float64), epsT.Data().([]float64), R.Data().([]float64)
	wantMu := make([]float64, n*d)
	wantLv := make([]float64, n*d)
	for s := 0; s < k; s++ {
		for i := 0; i < n*d; i++ {
			wantMu[i] += rr[s*n*d+i]
			wantLv[i] += rr[s*n*d+i] * eps[s*n*d+i] * math.Exp(lv[i]/2) / 2
		}
	}
	if !floats.EqualApprox(gotMu, wantMu, 1e-12) {
		t.Errorf("dL/dmu %v, analytic %v", gotMu, wantMu)
	}
	if !floats.EqualApprox(gotLv, wantLv, 1e-12) {
		t.Errorf("dL/dlogVar %v, analytic %v", gotLv, wantLv)
	}
	// reference: gonum diff/fd.Gradient, central differences, step 1e-6.
	for _, c := range []struct {
		name string
		data []float64
		got  []float64
	}{{"mu", mu, gotMu}, {"logVar", lv, gotLv}} {
		orig := append([]float64(nil), c.data...)
		num := fd.Gradient(nil, func(v []float64) float64 { copy(c.data, v); return run() }, orig, &fd.Settings{Formula: fd.Central, Step: 1e-6})
		copy(c.data, orig)
		if !floats.EqualApprox(c.got, num, 1e-6) {
			t.Errorf("dL/d%s %v, finite differences %v", c.name, c.got, num)
		}
	}
}

func TestReparameterizeLeavesInputsIntact(t *testing.T) {
	// Regression test for the gorgonia reshape quirk: with K > 1 the
	// backward pass once wrote into eps through a reshaped view.
	for _, k := range []int{1, 4} {
		const n, d = 3, 2
		muT, lvT, epsT := randTensor(91, 1, n, d), randTensor(92, 1, n, d), randTensor(93, 1, k*n, d)
		R := randTensor(94, 1, k*n, d)
		want := [][]float64{toF64(muT.Data()), toF64(lvT.Data()), toF64(epsT.Data())}
		g := G.NewGraph()
		mun, lvn := input(g, "mu", muT), input(g, "logVar", lvT)
		z, err := Reparameterize(mun, lvn, input(g, "eps", epsT))
		if err != nil {
			t.Fatal(err)
		}
		loss := G.Must(G.Sum(G.Must(G.HadamardProd(input(g, "R", R), z))))
		if _, err := G.Grad(loss, mun, lvn); err != nil {
			t.Fatal(err)
		}
		m := G.NewTapeMachine(g)
		for r := 0; r < 2; r++ {
			m.Reset()
			if err := m.RunAll(); err != nil {
				t.Fatal(err)
			}
		}
		m.Close()
		for i, got := range [][]float64{muT.Data().([]float64), lvT.Data().([]float64), epsT.Data().([]float64)} {
			if !floats.Equal(got, want[i]) {
				t.Errorf("K=%d: input %d changed by running the graph", k, i)
			}
		}
	}
}
