package vae

import (
	"context"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distmv"
	"gonum.org/v1/gonum/stat/distuv"

	"lowerbound.dev/vae/dataset"
)

// gonumRef recomputes, outside the graph, what Score and Evaluate report.
// It takes the posterior from m.Encode and the likelihood's mean from
// m.Decode, reproduces the noise as ScoreOptions.Keys documents it (record
// r's noise from PCG(seed, r), NormFloat64 in the order sample s, dimension j),
// and does every density and divergence with gonum.
type gonumRef struct {
	logLik [][]float64 // [record][sample] log p(x|z_s)
	logW   [][]float64 // [record][sample] log p(x|z_s) + log p(z_s) - log q(z_s|x)
	kl     []float64   // [record] closed-form KL(q(z|x) || N(0, I)), or the K-sample Monte Carlo mean of log q - log p
	klDim  [][]float64 // [record][dim]; nil for a prior given as logPrior
}

// refModel names the reference densities: logLik(x, mean) is log p(x|z)
// given the likelihood's mean at z; logPrior(z) is log p(z), nil for the
// standard normal (whose KL is then taken in closed form).
type refModel struct {
	logLik   func(x, mean []float64) float64
	logPrior func(z []float64) float64
}

// bernoulliRef is log p(x|z) of a Bernoulli decoder from its probabilities.
func bernoulliRef(x, p []float64) float64 {
	var ll float64
	for f, xf := range x {
		// reference: gonum stat/distuv Bernoulli.LogProb
		ll += distuv.Bernoulli{P: p[f]}.LogProb(xf)
	}
	return ll
}

func newGonumRef(t *testing.T, m *Model, data *dataset.Set, k int, seed uint64, rm refModel) gonumRef {
	t.Helper()
	return newGonumRefKeys(t, m, data, k, seed, nil, rm)
}

// newGonumRefKeys is newGonumRef with record r's noise drawn from
// PCG(seed, keys[r]) (the documented scheme of ScoreOptions.Keys); nil keys
// mean keys[r] = r.
func newGonumRefKeys(t *testing.T, m *Model, data *dataset.Set, k int, seed uint64, keys []uint64, rm refModel) gonumRef {
	t.Helper()
	ctx := context.Background()
	mean, sigma, err := m.Encode(ctx, data)
	if err != nil {
		t.Fatalf("Encode: %v", err)
	}
	n, d := data.Len(), m.Latent()
	z := mat.NewDense(n*k, d, nil)
	for r := 0; r < n; r++ {
		key := uint64(r)
		if keys != nil {
			key = keys[r]
		}
		rng := rand.New(rand.NewPCG(seed, key))
		for s := 0; s < k; s++ {
			for j := 0; j < d; j++ {
				eps := rng.NormFloat64()
				z.Set(r*k+s, j, mean.At(r, j)+sigma.At(r, j)*eps)
			}
		}
	}
	var labels []int
	if m.Classes() > 0 {
		for r := 0; r < n; r++ {
			for s := 0; s < k; s++ {
				labels = append(labels, data.Label(r))
			}
		}
	}
	lmean, err := m.Decode(ctx, z, labels)
	if err != nil {
		t.Fatalf("Decode: %v", err)
	}
	identity := mat.NewSymDense(d, nil)
	for j := 0; j < d; j++ {
		identity.SetSym(j, j, 1)
	}
	stdNormal, ok := distmv.NewNormal(make([]float64, d), identity, nil)
	if !ok {
		t.Fatal("distmv.NewNormal(0, I) failed")
	}
	logPrior := rm.logPrior
	closedForm := logPrior == nil
	if closedForm {
		// reference: gonum stat/distmv Normal.LogProb
		logPrior = stdNormal.LogProb
	}
	ref := gonumRef{logLik: make([][]float64, n), logW: make([][]float64, n), kl: make([]float64, n)}
	if closedForm {
		ref.klDim = make([][]float64, n)
	}
	for r := 0; r < n; r++ {
		mu := mat.Row(nil, r, mean)
		cov := mat.NewSymDense(d, nil)
		for j := 0; j < d; j++ {
			s := sigma.At(r, j)
			cov.SetSym(j, j, s*s)
		}
		q, ok := distmv.NewNormal(mu, cov, nil)
		if !ok {
			t.Fatalf("record %d: distmv.NewNormal(mu, diag sigma^2) failed", r)
		}
		if closedForm {
			// reference: gonum stat/distmv KullbackLeibler.DistNormal
			ref.kl[r] = distmv.KullbackLeibler{}.DistNormal(q, stdNormal)
			ref.klDim[r] = make([]float64, d)
			for j := 0; j < d; j++ {
				s := sigma.At(r, j)
				qj, ok1 := distmv.NewNormal([]float64{mu[j]}, mat.NewSymDense(1, []float64{s * s}), nil)
				pj, ok2 := distmv.NewNormal([]float64{0}, mat.NewSymDense(1, []float64{1}), nil)
				if !ok1 || !ok2 {
					t.Fatalf("record %d, dimension %d: distmv.NewNormal failed (sigma %v)", r, j, s)
				}
				// reference: gonum stat/distmv KullbackLeibler.DistNormal, one dimension at a time
				ref.klDim[r][j] = distmv.KullbackLeibler{}.DistNormal(qj, pj)
			}
		}
		x := data.Row(r)
		ref.logLik[r] = make([]float64, k)
		ref.logW[r] = make([]float64, k)
		for s := 0; s < k; s++ {
			ll := rm.logLik(x, mat.Row(nil, r*k+s, lmean))
			zs := mat.Row(nil, r*k+s, z)
			lp, lq := logPrior(zs), q.LogProb(zs) // reference: gonum stat/distmv Normal.LogProb for log q(z|x)
			ref.logLik[r][s] = ll
			ref.logW[r][s] = ll + lp - lq
			if !closedForm {
				// Monte Carlo KL: the mean over the samples of log q - log p.
				ref.kl[r] += (lq - lp) / float64(k)
			}
		}
	}
	return ref
}

// iwEstimate is the importance-weighted estimate of log p(x) from K
// weights: log (1/K) sum_k w_k (Burda, Grosse and Salakhutdinov 2016,
// "Importance Weighted Autoencoders", eq. 8, from memory), computed with gonum
// floats.LogSumExp.
func iwEstimate(logW []float64) float64 {
	return floats.LogSumExp(logW) - math.Log(float64(len(logW)))
}

// trainedSmallMLP returns smallMLP after a few Adam steps on data, so the
// posterior is not the one at initialisation.
func trainedSmallMLP(t *testing.T, data *dataset.Set) *Model {
	t.Helper()
	m := smallMLP(t, 3)
	if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 3, BatchSize: 16, LearnRate: 0.01, Seed: 5}); err != nil {
		t.Fatalf("Train: %v", err)
	}
	return m
}

// TestScoreMatchesGonum checks Score against the gonum recomputation. 130
// records make the inference run in two chunks (128 and 2), so the noise
// of records 128 and 129 checks that record indices carry across chunks.
// Tolerance 1e-9 relative: the graph and the reference do the same float64
// arithmetic in a different order (and with log-sigmoid versus log of the
// probability), which costs a few ulps per term, far below 1e-9.
func TestScoreMatchesGonum(t *testing.T) {
	ctx := context.Background()
	data := binarySet(t, 130, 12, 7)
	m := trainedSmallMLP(t, data)
	const seed = 11

	ref1 := newGonumRef(t, m, data, 1, seed, refModel{logLik: bernoulliRef})
	s1, err := m.Score(ctx, data, ScoreOptions{K: 1, Seed: seed})
	if err != nil {
		t.Fatalf("Score(K=1): %v", err)
	}
	for r := range s1 {
		// K = 1: the negative ELBO of one sample, KL - log p(x|z)
		// (Kingma and Welling 2014, eq. 10, from memory), with gonum
		// distmv KullbackLeibler.DistNormal and distuv Bernoulli.LogProb.
		want := ref1.kl[r] - ref1.logLik[r][0]
		if !relClose(s1[r], want, 1e-9) {
			t.Errorf("Score(K=1) record %d = %.15g, gonum reference %.15g", r, s1[r], want)
		}
	}

	for _, k := range []int{2, 5} {
		ref := newGonumRef(t, m, data, k, seed, refModel{logLik: bernoulliRef})
		sk, err := m.Score(ctx, data, ScoreOptions{K: k, Seed: seed})
		if err != nil {
			t.Fatalf("Score(K=%d): %v", k, err)
		}
		for r := range sk {
			// reference: Burda et al. 2016, eq. 8, with gonum floats.LogSumExp and distmv densities
			want := -iwEstimate(ref.logW[r])
			if !relClose(sk[r], want, 1e-9) {
				t.Errorf("Score(K=%d) record %d = %.15g, gonum reference %.15g", k, r, sk[r], want)
			}
		}
	}
}

func TestEvaluateMatchesGonum(t *testing.T) {
	ctx := context.Background()
	data := binarySet(t, 37, 12, 8)
	m := trainedSmallMLP(t, data)
	const seed = 4
	n := float64(data.Len())

	for _, k := range []int{1, 4} {
		ref := newGonumRef(t, m, data, k, seed, refModel{logLik: bernoulliRef})
		rep, err := m.Evaluate(ctx, data, EvalOptions{K: k, Seed: seed})
		if err != nil {
			t.Fatalf("Evaluate(K=%d): %v", k, err)
		}
		if rep.Records != data.Len() || rep.K != k {
			t.Errorf("K=%d: Records %d, K %d; want %d, %d", k, rep.Records, rep.K, data.Len(), k)
		}
		var recon, nll float64
		klDim := make([]float64, m.Latent())
		for r := range ref.kl {
			for _, ll := range ref.logLik[r] {
				recon -= ll / float64(k)
			}
			nll -= iwEstimate(ref.logW[r])
			floats.Add(klDim, ref.klDim[r])
		}
		recon /= n
		nll /= n
		floats.Scale(1/n, klDim)
		// reference: gonum stat/distmv KullbackLeibler.DistNormal, averaged with gonum stat.Mean
		klMean := stat.Mean(ref.kl, nil)
		if !relClose(rep.KL, klMean, 1e-9) {
			t.Errorf("K=%d: KL %.15g, gonum mean KL %.15g", k, rep.KL, klMean)
		}
		// reference: gonum stat/distuv Bernoulli.LogProb, averaged over samples and records
		if !relClose(rep.Reconstruction, recon, 1e-9) {
			t.Errorf("K=%d: Reconstruction %.15g, gonum %.15g", k, rep.Reconstruction, recon)
		}
		// Definition: -ELBO = -E_q[log p(x|z)] + KL (Kingma and Welling 2014, eq. 3, from memory).
		if !relClose(rep.NegELBO, rep.Reconstruction+rep.KL, 1e-12) {
			t.Errorf("K=%d: NegELBO %.15g != Reconstruction + KL %.15g", k, rep.NegELBO, rep.Reconstruction+rep.KL)
		}
		if len(rep.KLPerDim) != m.Latent() {
			t.Fatalf("K=%d: KLPerDim has %d entries, want %d", k, len(rep.KLPerDim), m.Latent())
		}
		// The KL of a diagonal Gaussian to N(0, I) is the sum of the
		// per-dimension KLs (independence); checked with gonum floats.Sum.
		if !relClose(floats.Sum(rep.KLPerDim), rep.KL, 1e-12) {
			t.Errorf("K=%d: KLPerDim sums to %.15g, KL is %.15g", k, floats.Sum(rep.KLPerDim), rep.KL)
		}
		for j := range klDim {
			// reference: gonum stat/distmv KullbackLeibler.DistNormal in one dimension
			if !relClose(rep.KLPerDim[j], klDim[j], 1e-9) {
				t.Errorf("K=%d: KLPerDim[%d] %.15g, gonum %.15g", k, j, rep.KLPerDim[j], klDim[j])
			}
		}
		if k == 1 {
			if !math.IsNaN(rep.NLL) {
				t.Errorf("K=1: NLL %v, want NaN", rep.NLL)
			}
			continue
		}
		// reference: Burda et al. 2016, eq. 8, with gonum floats.LogSumExp
		if !relClose(rep.NLL, nll, 1e-9) {
			t.Errorf("K=%d: NLL %.15g, gonum %.15g", k, rep.NLL, nll)
		}
		// For the same K weights, log mean w >= mean log w (Jensen's
		// inequality; Burda et al. 2016, theorem 1, from memory), so the estimate of
		// -log p(x) is at most the K-sample Monte Carlo negative ELBO.
		var mcNegELBO float64
		for r := range ref.logW {
			mcNegELBO -= stat.Mean(ref.logW[r], nil) / n
		}
		if rep.NLL > mcNegELBO+1e-9 {
			t.Errorf("K=%d: NLL %.15g above the K-sample Monte Carlo negative ELBO %.15g", k, rep.NLL, mcNegELBO)
		}
	}
}

// TestActiveUnits checks MeanVariance and ActiveUnits against gonum. The
// head's mean map is edited so that dimension 1 is constant and dimension
// 2 nearly so, making some units inactive and the count non-trivial.
func TestActiveUnits(t *testing.T) {
	ctx := context.Background()
	m, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 4, Dtype: smallMLP(t, 0).Dtype(), Seed: 9})
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range m.params {
		if p.Name != "head.mean.weight" {
			continue
		}
		w := p.Value.Data().([]float64)
		for i := 0; i < 8; i++ {
			w[i*4+0] *= 10   // surely active
			w[i*4+1] = 0     // constant mean: variance 0
			w[i*4+2] *= 1e-3 // variance far below the threshold
		}
	}
	data := binarySet(t, 50, 12, 10)
	mean, _, err := m.Encode(ctx, data)
	if err != nil {
		t.Fatal(err)
	}
	rep, err := m.Evaluate(ctx, data, EvalOptions{K: 1, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	active := 0
	for j := 0; j < m.Latent(); j++ {
		col := mat.Col(nil, j, mean)
		// reference: gonum stat.PopMeanVariance (population variance,
		// divisor N, not stat.Variance's N-1), the definition in
		// Burda et al. 2016, section 5.2: A_u = Cov_x(E_q[u]).
		_, v := stat.PopMeanVariance(col, nil)
		if !relClose(rep.MeanVariance[j], v, 1e-9) {
			t.Errorf("MeanVariance[%d] = %.15g, gonum PopMeanVariance %.15g", j, rep.MeanVariance[j], v)
		}
		// Burda et al. 2016, section 5.2: a unit is active when A_u > 0.01.
		if v > 0.01 {
			active++
		}
	}
	if active == 0 || active == m.Latent() {
		t.Fatalf("fixture gives %d active units of %d; the check needs some of each", active, m.Latent())
	}
	if rep.ActiveUnits != active {
		t.Errorf("ActiveUnits = %d, gonum variances give %d", rep.ActiveUnits, active)
	}

	one, err := data.Subset([]int{3})
	if err != nil {
		t.Fatal(err)
	}
	rep1, err := m.Evaluate(ctx, one, EvalOptions{K: 2, Seed: 1})
	if err != nil {
		t.Fatalf("Evaluate on one record: %v", err)
	}
	if rep1.ActiveUnits != 0 {
		t.Errorf("one record: ActiveUnits %d, want 0", rep1.ActiveUnits)
	}
	for j, v := range rep1.MeanVariance {
		if v != 0 {
			t.Errorf("one record: MeanVariance[%d] = %v, want 0", j, v)
		}
	}
	for name, v := range map[string]float64{"NegELBO": rep1.NegELBO, "Reconstruction": rep1.Reconstruction, "KL": rep1.KL, "NLL": rep1.NLL} {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			t.Errorf("one record: %s is %v", name, v)
		}
	}
}
