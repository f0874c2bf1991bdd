package losses_test

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distmv"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// The linear-Gaussian model of probabilistic PCA (Tipping and Bishop 1999):
//
//	z ~ N(0, I_D),   x | z ~ N(W z + b, s2 I_F)
//
// has marginal p(x) = N(x; b, W W^T + s2 I) and posterior
// p(z | x) = N(M^-1 W^T (x - b), s2 M^-1), M = W^T W + s2 I. With W = Q diag(c)
// for Q with orthonormal columns, M = diag(c^2 + s2) is diagonal, so the
// exact posterior is a diagonal Gaussian an encoder could output. Every
// ELBO is then checkable against exact numbers.
type ppca struct {
	f, d, n int
	s2      float64
	w       *mat.Dense // F x D
	c       []float64  // column scales of W
	b       []float64  // F
	x       []float64  // N x F, row-major
	logPx   []float64  // exact log p(x_n), gonum
	postMu  []float64  // N x D
	postLV  []float64  // N x D (the same in every row)
}

func newPPCA(t *testing.T) *ppca {
	t.Helper()
	rng := rand.New(rand.NewPCG(30, 31))
	p := &ppca{f: 5, d: 2, n: 4, s2: 0.3, c: []float64{2, 0.8}}
	// Q: orthonormal columns from the QR factorisation of a random matrix.
	var qr mat.QR
	qr.Factorize(mat.NewDense(p.f, p.d, randn(rng, p.f*p.d, 1)))
	var q mat.Dense
	qr.QTo(&q)
	p.w = mat.NewDense(p.f, p.d, nil)
	for i := 0; i < p.f; i++ {
		for j := 0; j < p.d; j++ {
			p.w.Set(i, j, q.At(i, j)*p.c[j])
		}
	}
	p.b = randn(rng, p.f, 1)
	// Data drawn from the model.
	for r := 0; r < p.n; r++ {
		z := randn(rng, p.d, 1)
		for i := 0; i < p.f; i++ {
			v := p.b[i] + math.Sqrt(p.s2)*rng.NormFloat64()
			for j := 0; j < p.d; j++ {
				v += p.w.At(i, j) * z[j]
			}
			p.x = append(p.x, v)
		}
	}
	cov := mat.NewSymDense(p.f, nil)
	for i := 0; i < p.f; i++ {
		for k := 0; k <= i; k++ {
			v := 0.0
			for j := 0; j < p.d; j++ {
				v += p.w.At(i, j) * p.w.At(k, j)
			}
			if i == k {
				v += p.s2
			}
			cov.SetSym(i, k, v)
		}
	}
	// reference: gonum stat/distmv Normal.LogProb of N(b, W W^T + s2 I)
	marg, ok := distmv.NewNormal(p.b, cov, nil)
	if !ok {
		t.Fatal("marginal covariance not positive definite")
	}
	for r := 0; r < p.n; r++ {
		xr := p.x[r*p.f : (r+1)*p.f]
		p.logPx = append(p.logPx, marg.LogProb(xr))
		// Posterior (Tipping and Bishop 1999): M^-1 W^T (x - b), s2 M^-1.
		for j := 0; j < p.d; j++ {
			m := p.c[j]*p.c[j] + p.s2
			dot := 0.0
			for i := 0; i < p.f; i++ {
				dot += p.w.At(i, j) * (xr[i] - p.b[i])
			}
			p.postMu = append(p.postMu, dot/m)
			p.postLV = append(p.postLV, math.Log(p.s2/m))
		}
	}
	// The columns of W must be orthogonal for the diagonal posterior.
	var wtw mat.Dense
	wtw.Mul(p.w.T(), p.w)
	if math.Abs(wtw.At(0, 1)) > 1e-12 {
		t.Fatalf("W^T W not diagonal: %v", wtw.At(0, 1))
	}
	return p
}

// expectedLogLik is E_q[log p(x_n | z)] for q = N(mu, diag(exp(lv))), in
// closed form: -(||x - W mu - b||^2 + sum_j c_j^2 v_j)/(2 s2) - (F/2) log(2 pi s2),
// since E||x - W z - b||^2 = ||x - W mu - b||^2 + tr(W diag(v) W^T) and
// W^T W = diag(c^2). (Standard Gaussian algebra, derived here.)
func (p *ppca) expectedLogLik(r int, mu, lv []float64) float64 {
	sse := 0.0
	for i := 0; i < p.f; i++ {
		v := p.x[r*p.f+i] - p.b[i]
		for j := 0; j < p.d; j++ {
			v -= p.w.At(i, j) * mu[j]
		}
		sse += v * v
	}
	for j := 0; j < p.d; j++ {
		sse += p.c[j] * p.c[j] * math.Exp(lv[j])
	}
	return -sse/(2*p.s2) - float64(p.f)/2*math.Log(2*math.Pi*p.s2)
}

// mcRun holds the per-sample terms of one run of the sampled graph: rows
// are k*N + n.
type mcRun struct {
	logPxz, logPz, logQ []float64 // K*N
	kl                  []float64 // N, closed form
	iw                  []float64 // N, importance-weighted bound
	iwBlocks            map[int][]float64
}

// mcGraph is the sampled ELBO graph for one q and K samples per record.
type mcGraph struct {
	g   *G.ExprGraph
	vm  G.VM
	eps *tensor.Dense
	out struct{ logPxz, logPz, logQ, kl, iw *G.Value }
	k   int
	// iwBlocks[b] holds L_b for each of K/b disjoint blocks of b samples
	// per record: K/b*N values, column c for record c mod N.
	iwBlocks map[int]*G.Value
}

// newMCGraph builds, with the package's functions, the terms of the ELBO
// for q = N(mu, diag(exp(lv))) and K reparameterised samples per record.
//
// For each b in blocks it also evaluates the importance-weighted bound L_b
// on the K/b disjoint blocks of b samples (see iwBlocks).
func newMCGraph(t *testing.T, p *ppca, mu, lv []float64, k int, blocks ...int) *mcGraph {
	t.Helper()
	dt := tensor.Float64
	g := G.NewGraph()
	m := &mcGraph{g: g, k: k}
	tile := func(a []float64) []float64 {
		var out []float64
		for i := 0; i < k; i++ {
			out = append(out, a...)
		}
		return out
	}
	muN := input(g, dt, "mu", p.n, p.d, mu)
	lvN := input(g, dt, "lv", p.n, p.d, lv)
	muT := input(g, dt, "muT", k*p.n, p.d, tile(mu))
	lvT := input(g, dt, "lvT", k*p.n, p.d, tile(lv))
	xT := input(g, dt, "x", k*p.n, p.f, tile(p.x))
	wt := input(g, dt, "Wt", p.d, p.f, mat.DenseCopyOf(p.w.T()).RawMatrix().Data)
	b := input(g, dt, "b", 1, p.f, p.b)
	m.eps = tensor.New(tensor.Of(dt), tensor.WithShape(k*p.n, p.d))
	eps := G.NewMatrix(g, dt, G.WithShape(k*p.n, p.d), G.WithName("eps"), G.WithValue(m.eps))

	must := func(n *G.Node, err error) *G.Node {
		t.Helper()
		if err != nil {
			t.Fatal(err)
		}
		return n
	}
	z := must(layers.Reparameterize(muN, lvN, eps))
	mean := must(G.BroadcastAdd(must(G.Mul(z, wt)), b, nil, []byte{0}))
	logPxz := must(losses.PerSample(must(losses.GaussianLogProb(xT, mean, math.Sqrt(p.s2)))))
	logPz := must(losses.PerSample(must(losses.StandardNormalLogProb(z))))
	logQ := must(losses.PerSample(must(losses.DiagGaussianLogProb(z, muT, lvT))))
	kl := must(losses.PerSample(must(losses.KLStandardNormal(muN, lvN))))
	logW := must(G.Sub(must(G.Add(logPxz, logPz)), logQ))
	iw := must(losses.ImportanceWeighted(must(G.Reshape(logW, tensor.Shape{k, p.n}))))
	// L_b on disjoint blocks of b of the K samples: reshaping the K*N log
	// weights (row s*N + n) to (b, K/b*N) puts in column c the b samples
	// {a*K/b + c/N : a < b} of record c mod N, no sample in two columns.
	m.iwBlocks = make(map[int]*G.Value)
	for _, b := range blocks {
		if k%b != 0 {
			t.Fatalf("block %d does not divide K = %d", b, k)
		}
		lb := must(losses.ImportanceWeighted(must(G.Reshape(logW, tensor.Shape{b, k / b * p.n}))))
		m.iwBlocks[b] = watch(lb)
	}
	m.out.logPxz, m.out.logPz, m.out.logQ = watch(logPxz), watch(logPz), watch(logQ)
	m.out.kl, m.out.iw = watch(kl), watch(iw)
	m.vm = G.NewTapeMachine(g)
	t.Cleanup(func() { m.vm.Close() })
	return m
}

// run draws fresh noise from rng and evaluates the graph.
func (m *mcGraph) run(t *testing.T, rng *rand.Rand) mcRun {
	t.Helper()
	if err := layers.FillNormal(rng, m.eps); err != nil {
		t.Fatal(err)
	}
	if err := m.vm.RunAll(); err != nil {
		t.Fatal(err)
	}
	defer m.vm.Reset()
	blocks := make(map[int][]float64)
	for b, v := range m.iwBlocks {
		blocks[b] = values(t, v)
	}
	return mcRun{
		logPxz: values(t, m.out.logPxz), logPz: values(t, m.out.logPz), logQ: values(t, m.out.logQ),
		kl: values(t, m.out.kl), iw: values(t, m.out.iw), iwBlocks: blocks,
	}
}

// meanSE returns the sample mean and its standard error.
func meanSE(x []float64) (float64, float64) {
	m, s := stat.MeanStdDev(x, nil)
	return m, s / math.Sqrt(float64(len(x)))
}

// Part (a): with q the exact posterior, every single-sample ELBO equals
// log p(x) (the estimator has zero variance, since p(x|z)p(z)/q(z|x) = p(x)
// for every z), and the analytic ELBO E_q[log p(x|z)] - KL equals log p(x).
func TestPPCAExactPosteriorELBO(t *testing.T) {
	p := newPPCA(t)
	const k = 2000
	m := newMCGraph(t, p, p.postMu, p.postLV, k)
	res := m.run(t, rand.New(rand.NewPCG(40, 41)))
	for r := 0; r < p.n; r++ {
		for s := 0; s < k; s++ {
			i := s*p.n + r
			elbo := res.logPxz[i] + res.logPz[i] - res.logQ[i]
			// reference: gonum distmv log p(x); tolerance 1e-9 relative: only
			// rounding separates the two
			if !closeTo(elbo, p.logPx[r], 1e-9, 1) {
				t.Fatalf("record %d sample %d: single-sample ELBO %v, log p(x) %v", r, s, elbo, p.logPx[r])
			}
		}
		mu, lv := p.postMu[r*p.d:(r+1)*p.d], p.postLV[r*p.d:(r+1)*p.d]
		// reference: closed-form expected log-likelihood (above) minus the
		// package's KL must equal gonum's log p(x) to rounding
		analytic := p.expectedLogLik(r, mu, lv) - res.kl[r]
		if !closeTo(analytic, p.logPx[r], 1e-9, 1) {
			t.Errorf("record %d: analytic ELBO %v, log p(x) %v", r, analytic, p.logPx[r])
		}
		// Monte Carlo: mean over K of log p(x|z_k), minus KL. Tolerance 5
		// standard errors of the mean (a false alarm has probability about
		// 6e-7 for a normal mean; the seed is fixed anyway).
		ll := make([]float64, k)
		for s := range ll {
			ll[s] = res.logPxz[s*p.n+r]
		}
		mean, se := meanSE(ll)
		if math.Abs(mean-res.kl[r]-p.logPx[r]) > 5*se {
			t.Errorf("record %d: MC ELBO %v +- %v, log p(x) %v", r, mean-res.kl[r], se, p.logPx[r])
		}
	}
}

// Part (b): for any other q the ELBO is lower, by exactly
// KL(q || p(z|x)) (ELBO = log p(x) - KL(q || posterior), Kingma and Welling
// 2014, eq. 1).
func TestPPCAOtherPosteriorsAreLower(t *testing.T) {
	p := newPPCA(t)
	const k = 2000
	var kl distmv.KullbackLeibler
	perturb := []struct {
		name     string
		dMu, dLV float64
	}{
		{"mean shifted", 0.5, 0},
		{"variance x3", 0, math.Log(3)},
		{"variance /3", 0, -math.Log(3)},
		{"both", -0.3, math.Log(2)},
	}
	for pi, pt := range perturb {
		mu, lv := append([]float64(nil), p.postMu...), append([]float64(nil), p.postLV...)
		for i := range mu {
			mu[i] += pt.dMu
			lv[i] += pt.dLV
		}
		m := newMCGraph(t, p, mu, lv, k)
		res := m.run(t, rand.New(rand.NewPCG(50, uint64(pi))))
		for r := 0; r < p.n; r++ {
			qm, ql := mu[r*p.d:(r+1)*p.d], lv[r*p.d:(r+1)*p.d]
			// reference: gonum stat/distmv KullbackLeibler.DistNormal to the
			// exact posterior
			gap := kl.DistNormal(diagNormal(t, qm, ql), diagNormal(t, p.postMu[r*p.d:(r+1)*p.d], p.postLV[r*p.d:(r+1)*p.d]))
			analytic := p.expectedLogLik(r, qm, ql) - res.kl[r]
			if !closeTo(analytic, p.logPx[r]-gap, 1e-9, 1) {
				t.Errorf("%s record %d: analytic ELBO %v, log p(x) - KL(q||post) = %v", pt.name, r, analytic, p.logPx[r]-gap)
			}
			if gap < 0.05 {
				t.Fatalf("%s record %d: perturbation too small (gap %v) to test", pt.name, r, gap)
			}
			// Monte Carlo single-sample ELBO, averaged over K: within 5
			// standard errors of the analytic value and below log p(x) by
			// more than 5 standard errors.
			e := make([]float64, k)
			for s := range e {
				i := s*p.n + r
				e[s] = res.logPxz[i] + res.logPz[i] - res.logQ[i]
			}
			mean, se := meanSE(e)
			if math.Abs(mean-analytic) > 5*se {
				t.Errorf("%s record %d: MC ELBO %v +- %v, analytic %v", pt.name, r, mean, se, analytic)
			}
			if !(p.logPx[r]-mean > 5*se) {
				t.Errorf("%s record %d: MC ELBO %v +- %v not below log p(x) %v", pt.name, r, mean, se, p.logPx[r])
			}
		}
	}
}

// Part (c): the importance-weighted bound rises toward log p(x) as K grows
// (Burda, Grosse and Salakhutdinov 2016, Theorem 1: E[L_K] <= E[L_M] <=
// log p(x) for K <= M, and L_K -> log p(x) when the weights are bounded).
//
// Each repeat draws 1000 samples per record; L_1, L_10, L_100 and L_1000
// are all estimated from them on disjoint blocks (1000, 100, 10 and 1
// blocks), so each block mean is an unbiased estimate of E[L_K] and the
// shared samples make the differences between K precise.
func TestPPCAImportanceWeightedBoundRises(t *testing.T) {
	p := newPPCA(t)
	mu, lv := append([]float64(nil), p.postMu...), append([]float64(nil), p.postLV...)
	for i := range mu {
		mu[i] += 0.4
		lv[i] += math.Log(2) // wider than the posterior: bounded weights
	}
	logPx := 0.0
	for _, v := range p.logPx {
		logPx += v
	}
	ks := []int{1, 10, 100, 1000}
	const repeats = 300
	m := newMCGraph(t, p, mu, lv, 1000, ks...)
	rng := rand.New(rand.NewPCG(60, 61))
	// est[i][r]: in repeat r, the mean of L_K over blocks, summed over records.
	est := make([][]float64, len(ks))
	for r := 0; r < repeats; r++ {
		res := m.run(t, rng)
		for i, k := range ks {
			v := res.iwBlocks[k]
			blocks := len(v) / p.n
			s := 0.0
			for _, x := range v {
				s += x
			}
			est[i] = append(est[i], s/float64(blocks))
		}
		// The K = 1000 bound built directly must equal the one-block case.
		if !closeTo(sum(res.iw), sum(res.iwBlocks[1000]), 1e-12, 1) {
			t.Fatalf("L_1000 %v differs from its block form %v", sum(res.iw), sum(res.iwBlocks[1000]))
		}
	}
	// L_1 is the ELBO: its mean must match the analytic ELBO of q
	// (closed-form expected log-likelihood minus the package's KL).
	analytic := 0.0
	kl := m.run(t, rng).kl
	for r := 0; r < p.n; r++ {
		analytic += p.expectedLogLik(r, mu[r*p.d:(r+1)*p.d], lv[r*p.d:(r+1)*p.d]) - kl[r]
	}
	if mean, se := meanSE(est[0]); math.Abs(mean-analytic) > 5*se {
		t.Errorf("E[L_1] %v +- %v, analytic ELBO %v", mean, se, analytic)
	}
	means := make([]float64, len(ks))
	for i, k := range ks {
		mean, se := meanSE(est[i])
		means[i] = mean
		t.Logf("K=%4d: E[L_K] summed over records %.5f +- %.5f (log p(x) %.5f)", k, mean, se, logPx)
		// In expectation L_K <= log p(x); allow 5 standard errors (a false
		// alarm has probability about 3e-7 for a normal mean).
		if mean > logPx+5*se {
			t.Errorf("K=%d: L_K %v above log p(x) %v by more than 5 SE (%v)", k, mean, logPx, se)
		}
	}
	for i := 1; i < len(ks); i++ {
		d := make([]float64, repeats)
		for r := range d {
			d[r] = est[i][r] - est[i-1][r]
		}
		mean, se := meanSE(d)
		// A strict rise beyond the noise: more than 5 SE of the difference.
		if !(mean > 5*se) {
			t.Errorf("L_K did not rise from K=%d to K=%d: difference %v +- %v", ks[i-1], ks[i], mean, se)
		}
	}
	gap1, gap1000 := logPx-means[0], logPx-means[len(means)-1]
	if !(gap1000 < gap1/20) {
		t.Errorf("gap at K=1000 %v not much smaller than at K=1 %v", gap1000, gap1)
	}
}
