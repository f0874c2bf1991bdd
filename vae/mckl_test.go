package vae

import (
	"context"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distmv"
	"gorgonia.org/tensor"

	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
)

// The Monte Carlo KL of the trainer and of Evaluate, for a prior without a
// closed form, checked against the exact KL(q(z|x) || p(z)) of every
// record, computed outside the project: gonum distmv densities, and the
// expectation over q by Gauss-Hermite quadrature (gonum integrate/quad).

// ghRule returns the n Gauss-Hermite nodes and weights for
// int e^(-x^2) f(x) dx (gonum integrate/quad Hermite).
func ghRule(n int) (x, w []float64) {
	x, w = make([]float64, n), make([]float64, n)
	quad.Hermite{}.FixedLocations(x, w, math.Inf(-1), math.Inf(1))
	return x, w
}

// ghExpect2 returns E[g(z)] for z ~ N(mu, diag(sigma^2)) in two dimensions:
// pi^-1 sum_ij w_i w_j g(mu + sqrt(2) sigma (x_i, x_j)).
func ghExpect2(x, w, mu, sigma []float64, g func(z []float64) float64) float64 {
	z := make([]float64, 2)
	var s float64
	for i := range x {
		z[0] = mu[0] + math.Sqrt2*sigma[0]*x[i]
		for j := range x {
			z[1] = mu[1] + math.Sqrt2*sigma[1]*x[j]
			s += w[i] * w[j] / math.Pi * g(z)
		}
	}
	return s
}

func diagNormal(t *testing.T, mu, sigma []float64) *distmv.Normal {
	t.Helper()
	cov := mat.NewSymDense(len(mu), nil)
	for j, s := range sigma {
		cov.SetSym(j, j, s*s)
	}
	n, ok := distmv.NewNormal(mu, cov, nil)
	if !ok {
		t.Fatalf("distmv.NewNormal rejected sigma %v", sigma)
	}
	return n
}

func TestTrainerMonteCarloKL(t *testing.T) {
	if testing.Short() {
		t.Skip("statistical check; a few seconds")
	}
	const n, f, d = 300, 6, 2
	// A fixed mixture prior far from the standard normal: three components
	// with unequal weights, means and scales.
	logits := []float64{0.4, -1.0, 0.9}
	means := []float64{-2, 1, 0.5, -0.5, 3, 2}
	logVars := []float64{-1, 0.2, 0.5, -0.3, 0, -0.8}
	prior, err := priors.NewMixture("prior", 3, d, priors.MixtureOptions{Dtype: tensor.Float64, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	for i, v := range [][]float64{logits, means, logVars} {
		copy(prior.Params()[i].Value.Data().([]float64), v)
	}
	m, err := NewMLP(MLPConfig{Input: f, Hidden: []int{8}, Latent: d, Dtype: tensor.Float64, Seed: 7, Prior: prior})
	if err != nil {
		t.Fatal(err)
	}
	if _, ok := m.Prior().(priors.ClosedFormKL); ok {
		t.Fatal("fixture: the mixture has a closed-form KL")
	}
	rng := rand.New(rand.NewPCG(4, 4))
	rows := make([][]float64, n)
	for i := range rows {
		rows[i] = make([]float64, f)
		for j := range rows[i] {
			rows[i][j] = 0.3 * rng.NormFloat64()
		}
	}
	data, err := dataset.FromRows(rows)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	mean, sigma, err := m.Encode(ctx, data)
	if err != nil {
		t.Fatal(err)
	}

	// Reference, per record: KL_i = E_q[log q(z) - log p(z)] and the
	// variance V_i of one Monte Carlo term, by a 24 x 24 Gauss-Hermite rule,
	// with log p the mixture log sum_k w_k N(z; mu_k, diag(exp v_k)),
	// w = softmax(logits) (the documented parametrisation), from gonum
	// distmv and floats.LogSumExp.
	comps := make([]*distmv.Normal, 3)
	logW := make([]float64, 3)
	for k := range comps {
		comps[k] = diagNormal(t, means[k*d:(k+1)*d], []float64{math.Exp(logVars[k*d] / 2), math.Exp(logVars[k*d+1] / 2)})
		logW[k] = logits[k] - floats.LogSumExp(logits)
	}
	terms := make([]float64, 3)
	logP := func(z []float64) float64 {
		for k := range terms {
			terms[k] = logW[k] + comps[k].LogProb(z)
		}
		return floats.LogSumExp(terms)
	}
	gx, gw := ghRule(24)
	var klSum, varSum, stdSum float64
	for i := range n {
		mu, sg := mean.RawRowView(i), sigma.RawRowView(i)
		q := diagNormal(t, mu, sg)
		term := func(z []float64) float64 { return q.LogProb(z) - logP(z) }
		kl := ghExpect2(gx, gw, mu, sg, term)
		second := ghExpect2(gx, gw, mu, sg, func(z []float64) float64 { v := term(z); return v * v })
		// Check the rule on a case with a closed form: E_q[log q] = -H(q).
		if i == 0 {
			if h := ghExpect2(gx, gw, mu, sg, q.LogProb); math.Abs(h+q.Entropy()) > 1e-10 {
				t.Fatalf("quadrature E_q[log q] = %v, -entropy %v", h, -q.Entropy())
			}
		}
		klSum += kl
		varSum += second - kl*kl
		// The closed-form KL to the standard normal: what an estimator that
		// ignored the prior would report (gonum distmv KullbackLeibler).
		stdSum += distmv.KullbackLeibler{}.DistNormal(q, diagNormal(t, []float64{0, 0}, []float64{1, 1}))
	}
	exact := klSum / n

	// The trainer: SGD with a learning rate of 1e-300 leaves the parameters
	// as they are (checked below), so each step's KL is a fresh one-sample
	// Monte Carlo estimate of the batch mean at the same posteriors.
	const epochs = 100
	var kls []float64
	_, err = m.Train(ctx, data, TrainConfig{Epochs: epochs, BatchSize: n, Optimizer: SGD, LearnRate: 1e-300, Seed: 9,
		OnStep: func(s StepInfo) { kls = append(kls, s.KL) }})
	if err != nil {
		t.Fatal(err)
	}
	if len(kls) != epochs {
		t.Fatalf("%d steps, want %d", len(kls), epochs)
	}
	mean2, sigma2, err := m.Encode(ctx, data)
	if err != nil {
		t.Fatal(err)
	}
	if !mat.EqualApprox(mean, mean2, 1e-12) || !mat.EqualApprox(sigma, sigma2, 1e-12) {
		t.Fatal("training with learning rate 1e-300 moved the posteriors")
	}
	// The mean of the steps' estimates has variance sum_i V_i / (n^2 steps).
	trainSE := math.Sqrt(varSum/epochs) / n
	got := floats.Sum(kls) / epochs
	t.Logf("trainer: Monte Carlo KL %.5f, exact %.5f, se %.5f; standard-normal KL %.5f", got, exact, trainSE, stdSum/n)
	// 5 standard errors (common practice): a false failure at this fixed
	// seed is out of reach, while a density off by a few percent is not.
	if math.Abs(got-exact) > 5*trainSE {
		t.Errorf("trainer's Monte Carlo KL %.5f, exact %.5f (5 se = %.5f)", got, exact, 5*trainSE)
	}
	if trainSE > 0.01*exact {
		t.Errorf("standard error %.5f too large against KL %.5f for a sharp check", trainSE, exact)
	}
	if math.Abs(stdSum/n-exact) < 20*trainSE {
		t.Errorf("fixture: the standard-normal KL %.5f is too close to the mixture's %.5f to tell them apart", stdSum/n, exact)
	}

	// Evaluate: K = 50 samples per record.
	const k = 50
	rep, err := m.Evaluate(ctx, data, EvalOptions{K: k, Seed: 3})
	if err != nil {
		t.Fatal(err)
	}
	evalSE := math.Sqrt(varSum/k) / n
	t.Logf("Evaluate: Monte Carlo KL %.5f, exact %.5f, se %.5f", rep.KL, exact, evalSE)
	if math.Abs(rep.KL-exact) > 5*evalSE {
		t.Errorf("Evaluate's Monte Carlo KL %.5f, exact %.5f (5 se = %.5f)", rep.KL, exact, 5*evalSE)
	}
}
