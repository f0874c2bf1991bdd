package vae

import (
	"context"
	"math"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distmv"
	"gonum.org/v1/gonum/stat/distuv"
	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
)

// checkScoresAgainst compares Score (K = 1 and K = 3) and Evaluate's
// Reconstruction and KL with the gonum recomputation; tolerance 1e-9
// relative as in TestScoreMatchesGonum.
func checkScoresAgainst(t *testing.T, m *Model, data *dataset.Set, rm refModel) {
	t.Helper()
	ctx := context.Background()
	const seed = 21
	for _, k := range []int{1, 3} {
		ref := newGonumRef(t, m, data, k, seed, rm)
		scores, err := m.Score(ctx, data, ScoreOptions{K: k, Seed: seed})
		if err != nil {
			t.Fatalf("Score(K=%d): %v", k, err)
		}
		var recon float64
		for r, got := range scores {
			want := ref.kl[r] - ref.logLik[r][0] // K = 1: the one-sample negative ELBO
			if k > 1 {
				want = -iwEstimate(ref.logW[r]) // Burda et al. 2016, eq. 8
			}
			if !relClose(got, want, 1e-9) {
				t.Errorf("Score(K=%d) record %d = %.15g, gonum %.15g", k, r, got, want)
			}
			recon -= stat.Mean(ref.logLik[r], nil)
		}
		rep, err := m.Evaluate(ctx, data, EvalOptions{K: k, Seed: seed})
		if err != nil {
			t.Fatalf("Evaluate(K=%d): %v", k, err)
		}
		recon /= float64(data.Len())
		if !relClose(rep.Reconstruction, recon, 1e-9) || !relClose(rep.KL, stat.Mean(ref.kl, nil), 1e-9) {
			t.Errorf("Evaluate(K=%d): Reconstruction %.15g, KL %.15g; gonum %.15g, %.15g", k, rep.Reconstruction, rep.KL, recon, stat.Mean(ref.kl, nil))
		}
	}
}

// trainFew trains m for a few epochs and fails on any error or non-finite
// reported loss.
func trainFew(t *testing.T, m *Model, data *dataset.Set) []EpochInfo {
	t.Helper()
	hist, err := m.Train(context.Background(), data, TrainConfig{Epochs: 3, BatchSize: 10, LearnRate: 0.01, Seed: 2,
		OnStep: func(s StepInfo) {
			if math.IsNaN(s.Loss) || math.IsInf(s.Loss, 0) {
				t.Errorf("step %d: loss %v", s.Step, s.Loss)
			}
		}})
	if err != nil {
		t.Fatalf("Train: %v", err)
	}
	if len(hist) != 3 {
		t.Fatalf("history of %d epochs, want 3", len(hist))
	}
	return hist
}

func TestGaussianLikelihood(t *testing.T) {
	const sigma = 0.5
	m, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Dtype: tensor.Float64, Seed: 1, Likelihood: losses.Gaussian{Sigma: sigma}})
	if err != nil {
		t.Fatal(err)
	}
	data := realSet(t, 40, 12, 1)
	trainFew(t, m, data)
	checkScoresAgainst(t, m, data, refModel{logLik: func(x, mean []float64) float64 {
		var ll float64
		for f := range x {
			// reference: gonum stat/distuv Normal.LogProb
			ll += distuv.Normal{Mu: mean[f], Sigma: sigma}.LogProb(x[f])
		}
		return ll
	}})
}

func TestLearnedGaussianLikelihood(t *testing.T) {
	lik, err := losses.NewLearnedGaussian("lik", 12, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	m, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Dtype: tensor.Float64, Seed: 1, Likelihood: lik})
	if err != nil {
		t.Fatal(err)
	}
	if ps := m.Params(); ps[len(ps)-1].Name != "lik.log_sigma" {
		t.Fatalf("the likelihood's parameter is not among the model's: last is %s", ps[len(ps)-1].Name)
	}
	data := realSet(t, 40, 12, 1)
	trainFew(t, m, data)
	r := lik.Params()[0].Value.Data().([]float64)
	if floats.Norm(r, 2) == 0 {
		t.Fatal("training did not move the learned log sigma")
	}
	checkScoresAgainst(t, m, data, refModel{logLik: func(x, mean []float64) float64 {
		var ll float64
		for f := range x {
			// The documented bound of LearnedGaussian:
			// log sigma = MinLogSigma + softplus(r - MinLogSigma).
			logSigma := losses.MinLogSigma + math.Log1p(math.Exp(r[f]-losses.MinLogSigma))
			// reference: gonum stat/distuv Normal.LogProb
			ll += distuv.Normal{Mu: mean[f], Sigma: math.Exp(logSigma)}.LogProb(x[f])
		}
		return ll
	}})
}

// TestMixturePriorMonteCarloKL trains and evaluates with a prior that has
// no closed-form KL, and checks the Monte Carlo KL and the bound against a
// gonum mixture density.
func TestMixturePriorMonteCarloKL(t *testing.T) {
	m := mixtureMLP(t, 4)
	prior := m.Prior().(*priors.Mixture)
	if _, ok := m.Prior().(priors.ClosedFormKL); ok {
		t.Fatal("fixture: the mixture has a closed-form KL")
	}
	data := binarySet(t, 40, 12, 3)
	trainFew(t, m, data)
	rep, err := m.Evaluate(context.Background(), data, EvalOptions{K: 1, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	if rep.KLPerDim != nil {
		t.Errorf("KLPerDim %v, want nil without a closed-form KL", rep.KLPerDim)
	}
	if math.IsNaN(rep.KL) || math.IsInf(rep.KL, 0) || len(rep.MeanVariance) != 3 {
		t.Errorf("report %+v", rep)
	}
	ps := prior.Params()
	logits, means, logVars := ps[0].Value.Data().([]float64), ps[1].Value.Data().([]float64), ps[2].Value.Data().([]float64)
	if floats.Norm(logits, 2) == 0 && floats.Norm(logVars, 2) == 0 {
		t.Fatal("training did not move the prior")
	}
	kc, d := prior.Components(), prior.Dim()
	comps := make([]*distmv.Normal, kc)
	logWeights := make([]float64, kc)
	for c := 0; c < kc; c++ {
		cov := mat.NewSymDense(d, nil)
		for j := 0; j < d; j++ {
			cov.SetSym(j, j, math.Exp(logVars[c*d+j]))
		}
		var ok bool
		if comps[c], ok = distmv.NewNormal(means[c*d:(c+1)*d], cov, nil); !ok {
			t.Fatal("distmv.NewNormal failed")
		}
		// log softmax, with gonum floats.LogSumExp
		logWeights[c] = logits[c] - floats.LogSumExp(logits)
	}
	checkScoresAgainst(t, m, data, refModel{logLik: bernoulliRef, logPrior: func(z []float64) float64 {
		terms := make([]float64, kc)
		for c := range terms {
			// reference: gonum stat/distmv Normal.LogProb per component
			terms[c] = logWeights[c] + comps[c].LogProb(z)
		}
		return floats.LogSumExp(terms)
	}})
}
