package vae

import (
	"context"
	"math"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/stat/distuv"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
)

// TestScoreKeyedNoise checks that a record's score depends on its key, not
// on its position in the call: record i of a set scored with default keys
// scores the same alone with key i, in a permuted set with the permuted
// keys, and with the inference loops' bounds shrunk so that the records
// run in other batches and K in other chunks. Tolerance 1e-12 relative:
// the same float64 terms through graphs of other batch sizes.
func TestScoreKeyedNoise(t *testing.T) {
	ctx := context.Background()
	data := binarySet(t, 7, 12, 5)
	m := trainedSmallMLP(t, data)
	perm := []int{4, 0, 6, 2, 5, 1, 3}
	shuffled, err := data.Subset(perm)
	if err != nil {
		t.Fatal(err)
	}
	permKeys := make([]uint64, len(perm))
	for j, r := range perm {
		permKeys[j] = uint64(r)
	}
	for _, k := range []int{1, 5} {
		full, err := m.Score(ctx, data, ScoreOptions{K: k, Seed: 3})
		if err != nil {
			t.Fatal(err)
		}
		for i := range full {
			alone, err := data.Subset([]int{i})
			if err != nil {
				t.Fatal(err)
			}
			s, err := m.Score(ctx, alone, ScoreOptions{K: k, Seed: 3, Keys: []uint64{uint64(i)}})
			if err != nil {
				t.Fatal(err)
			}
			if !relClose(s[0], full[i], 1e-12) {
				t.Errorf("K=%d: record %d alone with key %d scores %.15g, %.15g in the full set", k, i, i, s[0], full[i])
			}
		}
		got, err := m.Score(ctx, shuffled, ScoreOptions{K: k, Seed: 3, Keys: permKeys})
		if err != nil {
			t.Fatal(err)
		}
		for j, r := range perm {
			if !relClose(got[j], full[r], 1e-12) {
				t.Errorf("K=%d: record %d at position %d with its key scores %.15g, %.15g in order", k, r, j, got[j], full[r])
			}
		}
		small, err := m.score(ctx, data, ScoreOptions{K: k, Seed: 3}, inferLimits{sampleRows: 4})
		if err != nil {
			t.Fatal(err)
		}
		for i := range full {
			if !relClose(small[i], full[i], 1e-12) {
				t.Errorf("K=%d: record %d scores %.15g in batches and chunks of at most 4 rows, %.15g otherwise", k, i, small[i], full[i])
			}
		}
	}

	// Explicit keys follow the documented scheme: the gonum recomputation
	// draws record r's noise from PCG(seed, keys[r]) by itself.
	keys := []uint64{1 << 40, 3, 3, 0, 99, 12345, 7} // records 1 and 2 share a key
	for _, k := range []int{1, 4} {
		ref := newGonumRefKeys(t, m, data, k, 8, keys, refModel{logLik: bernoulliRef})
		got, err := m.Score(ctx, data, ScoreOptions{K: k, Seed: 8, Keys: keys})
		if err != nil {
			t.Fatal(err)
		}
		for r := range got {
			// K = 1: Kingma and Welling 2014, eq. 10; K >= 2: Burda et al. 2016, eq. 8.
			want := ref.kl[r] - ref.logLik[r][0]
			if k > 1 {
				want = -iwEstimate(ref.logW[r])
			}
			if !relClose(got[r], want, 1e-9) {
				t.Errorf("K=%d, key %d: record %d scores %.15g, gonum reference %.15g", k, keys[r], r, got[r], want)
			}
		}
	}
	// Evaluate takes the same keys: the permuted set with its keys gives
	// the report of the set in order.
	a, err := m.Evaluate(ctx, data, EvalOptions{K: 3, Seed: 2})
	if err != nil {
		t.Fatal(err)
	}
	b, err := m.Evaluate(ctx, shuffled, EvalOptions{K: 3, Seed: 2, Keys: permKeys})
	if err != nil {
		t.Fatal(err)
	}
	if !relClose(a.NLL, b.NLL, 1e-12) || !relClose(a.Reconstruction, b.Reconstruction, 1e-12) {
		t.Errorf("Evaluate with permuted records and keys: NLL %.15g, Reconstruction %.15g; in order %.15g, %.15g", b.NLL, b.Reconstruction, a.NLL, a.Reconstruction)
	}

	_, err = m.Score(ctx, data, ScoreOptions{Keys: []uint64{1, 2}})
	wantErr(t, "Score with 2 keys for 7 records", err, layers.ErrInvalidArgument, "Keys", "2", "7")
	_, err = m.Evaluate(ctx, data, EvalOptions{Keys: make([]uint64, 8)})
	wantErr(t, "Evaluate with 8 keys for 7 records", err, layers.ErrInvalidArgument, "Keys", "8", "7")
}

// TestScoreAtPosteriorMean checks the deterministic score against an
// independent computation for a Gaussian likelihood with fixed sigma:
// -log p(x | z = mu) with gonum distuv.Normal on the decoded mean, plus
// the closed-form KL(N(mu, sigma^2) || N(0, I)) = -1/2 sum_j (1 + log
// sigma_j^2 - mu_j^2 - sigma_j^2) (Kingma and Welling 2014, "Auto-Encoding
// Variational Bayes", appendix B). mu and sigma come from Encode and the
// decoded mean from Decode, the model's own networks; the densities and
// the divergence are computed here. Tolerance 1e-9 relative as in
// TestScoreMatchesGonum.
func TestScoreAtPosteriorMean(t *testing.T) {
	ctx := context.Background()
	const sigma = 0.7
	m, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Dtype: tensor.Float64, Seed: 4, Likelihood: losses.Gaussian{Sigma: sigma}})
	if err != nil {
		t.Fatal(err)
	}
	data := realSet(t, 9, 12, 2)
	trainFew(t, m, data)
	mean, sd, err := m.Encode(ctx, data)
	if err != nil {
		t.Fatal(err)
	}
	dec, err := m.Decode(ctx, mean, nil)
	if err != nil {
		t.Fatal(err)
	}
	got, err := m.Score(ctx, data, ScoreOptions{AtPosteriorMean: true, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	for r := range got {
		x := data.Row(r)
		var logLik, kl float64
		for f, xf := range x {
			// reference: gonum stat/distuv Normal.LogProb
			logLik += distuv.Normal{Mu: dec.At(r, f), Sigma: sigma}.LogProb(xf)
		}
		for j := 0; j < m.Latent(); j++ {
			mu, s2 := mean.At(r, j), sd.At(r, j)*sd.At(r, j)
			// Kingma and Welling 2014, appendix B
			kl -= 0.5 * (1 + math.Log(s2) - mu*mu - s2)
		}
		if want := kl - logLik; !relClose(got[r], want, 1e-9) {
			t.Errorf("record %d: score at the posterior mean %.15g, reference %.15g", r, got[r], want)
		}
	}
	// No noise: the seed, keys and batching do not matter at all.
	again, err := m.score(ctx, data, ScoreOptions{AtPosteriorMean: true, Seed: 99, Keys: make([]uint64, data.Len())}, inferLimits{sampleRows: 4})
	if err != nil {
		t.Fatal(err)
	}
	for r := range got {
		if !relClose(again[r], got[r], 1e-12) {
			t.Errorf("record %d: %.15g with another seed, keys and batch, %.15g before", r, again[r], got[r])
		}
	}
	_, err = m.Score(ctx, data, ScoreOptions{AtPosteriorMean: true, K: 2})
	wantErr(t, "AtPosteriorMean with K 2", err, layers.ErrInvalidArgument, "K", "AtPosteriorMean")
}

// TestScoreAtPosteriorMeanNoClosedForm checks the deterministic score of a
// model whose prior has no closed-form KL (a Gaussian mixture) against an
// independent computation: -log p(x | z = mu) + log q(mu | x) - log p(mu)
// (the definition in ScoreOptions.AtPosteriorMean), every density from
// gonum's distuv.Normal, the mixture's log-density as gonum's
// floats.LogSumExp of log w_k + log N(mu; m_k, diag(exp(lv_k))). mu and
// sigma come from Encode, the decoded mean from Decode and the weights
// from Mixture.Weights; the densities are computed here. It runs on the
// lean path, on the graphs and through a Scorer, all three against the
// reference (1e-12 relative: float64 sums of a few terms).
func TestScoreAtPosteriorMeanNoClosedForm(t *testing.T) {
	ctx := context.Background()
	const sigma = 0.7
	build := func() (*Model, *priors.Mixture) {
		pr, err := priors.NewMixture("mix", 3, 2, priors.MixtureOptions{Dtype: tensor.Float64, Seed: 4})
		if err != nil {
			t.Fatal(err)
		}
		m := mustMLP(t, MLPConfig{Input: 6, Hidden: []int{8}, Latent: 2, Likelihood: losses.Gaussian{Sigma: sigma},
			Prior: pr, Dtype: tensor.Float64, Seed: 12})
		return m, pr
	}
	lean, pr := build()
	graph, _ := build()
	graphOnly(graph)
	data := realSet(t, 9, 6, 3)
	mean, sd, err := lean.Encode(ctx, data)
	if err != nil {
		t.Fatal(err)
	}
	dec, err := lean.Decode(ctx, mean, nil)
	if err != nil {
		t.Fatal(err)
	}
	w, err := pr.Weights()
	if err != nil {
		t.Fatal(err)
	}
	ps := pr.Params()
	cm, clv := ps[1].Value.Float64s(), ps[2].Value.Float64s()
	want := make([]float64, data.Len())
	for r := range want {
		var logLik, logQ float64
		for f, xf := range data.Row(r) {
			logLik += distuv.Normal{Mu: dec.At(r, f), Sigma: sigma}.LogProb(xf)
		}
		comp := make([]float64, len(w))
		for j := 0; j < 2; j++ {
			logQ += distuv.Normal{Mu: mean.At(r, j), Sigma: sd.At(r, j)}.LogProb(mean.At(r, j))
		}
		for k := range comp {
			comp[k] = math.Log(w[k])
			for j := 0; j < 2; j++ {
				comp[k] += distuv.Normal{Mu: cm[k*2+j], Sigma: math.Exp(clv[k*2+j] / 2)}.LogProb(mean.At(r, j))
			}
		}
		want[r] = -logLik + logQ - floats.LogSumExp(comp)
	}
	for _, m := range []*Model{lean, graph} {
		got, err := m.Score(ctx, data, ScoreOptions{AtPosteriorMean: true, Seed: 5})
		if err != nil {
			t.Fatal(err)
		}
		for r := range got {
			if !relClose(got[r], want[r], 1e-12) {
				t.Fatalf("lean path %v: record %d: score at the posterior mean %.15g, reference %.15g", m.lean != nil, r, got[r], want[r])
			}
		}
	}
	got, err := lean.ScoreRecords(ctx, Records{X: data.Values()}, ScorerOptions{Mean: true})
	if err != nil {
		t.Fatal(err)
	}
	for r := range got {
		if !relClose(got[r], want[r], 1e-12) {
			t.Fatalf("Scorer: record %d: score at the posterior mean %.15g, reference %.15g", r, got[r], want[r])
		}
	}
	_, err = lean.NewScorer(ScorerOptions{Mean: true, K: 2})
	wantErr(t, "Scorer with Mean and K 2", err, layers.ErrInvalidArgument, "K", "Mean")
}
