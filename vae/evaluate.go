package vae

import (
	"context"
	"fmt"
	"math"

	"lowerbound.dev/layers"
	"lowerbound.dev/vae/dataset"
)

// ActiveThreshold is the variance over the data of a latent dimension's
// posterior mean above which the dimension counts as active (Burda, Grosse
// and Salakhutdinov 2016, section 5.2).
const ActiveThreshold = 0.01

// EvalOptions configures Evaluate.
type EvalOptions struct {
	// K is the number of posterior samples per record. With K >= 2 the
	// report includes the importance-weighted estimate of -log p(x)
	// (Burda et al. 2016); the ELBO parts are then averaged over the K
	// samples. Zero means 1.
	K int
	// Seed makes the noise repeatable; record r's noise depends only on
	// Seed and r.
	Seed uint64
}

// Report holds evaluation results, all in nats per record.
type Report struct {
	Records int
	K       int
	// NegELBO = Reconstruction + KL, the negative evidence lower bound
	// with beta = 1.
	NegELBO float64
	// Reconstruction is the mean negative log-likelihood -E_q[log p(x|z)].
	Reconstruction float64
	// KL is the mean KL(q(z|x) || p(z)): closed form when the prior has
	// one, else the Monte Carlo estimate.
	KL float64
	// KLPerDim is the mean KL of each latent dimension; nil when the prior
	// has no closed-form KL (the divergence then does not split by
	// dimension).
	KLPerDim []float64
	// MeanVariance is, per latent dimension, the variance over the records
	// of the posterior mean (population variance, divisor N).
	MeanVariance []float64
	// ActiveUnits counts dimensions with MeanVariance > ActiveThreshold.
	ActiveUnits int
	// NLL is the importance-weighted estimate of -log p(x) with K samples,
	// an upper bound that tightens as K grows; NaN when K < 2.
	NLL float64
}

// Evaluate computes the report over every record of data.
func (m *Model) Evaluate(ctx context.Context, data *dataset.Set, opt EvalOptions) (Report, error) {
	return m.evaluate(ctx, data, opt, defaultInferLimits())
}

func (m *Model) evaluate(ctx context.Context, data *dataset.Set, opt EvalOptions, lim inferLimits) (Report, error) {
	if err := m.checkData("Evaluate", data); err != nil {
		return Report{}, err
	}
	k := opt.K
	if k == 0 {
		k = 1
	}
	if k < 1 {
		return Report{}, fmt.Errorf("vae.Evaluate: K: %d, want >= 1: %w", opt.K, layers.ErrInvalidArgument)
	}
	n, d := data.Len(), m.latent
	if n == 0 {
		return Report{}, fmt.Errorf("vae.Evaluate: data: no records: %w", layers.ErrInvalidArgument)
	}
	rep := Report{Records: n, K: k, NLL: math.NaN()}
	var klDim []float64
	means := make([]float64, 0, n*d)
	var sumRec, sumKL, sumIW float64
	err := m.forChunks(ctx, kindEvaluate, n, k, lim, func(p *program, first int, idx []int) error {
		if err := m.runSampled(p, data, first, idx, opt.Seed); err != nil {
			return err
		}
		ll, kl, mu := p.values(p.logLik), p.values(p.kl), p.values(p.mu)
		for i := range idx {
			sumRec -= ll[i]
			sumKL += kl[i]
		}
		means = append(means, mu[:len(idx)*d]...)
		if p.klDim != nil {
			if klDim == nil {
				klDim = make([]float64, d)
			}
			kd := p.values(p.klDim)
			for i := range idx {
				for j := 0; j < d; j++ {
					klDim[j] += kd[i*d+j]
				}
			}
		}
		if p.iw != nil {
			iw := p.values(p.iw)
			for i := range idx {
				sumIW -= iw[i]
			}
		}
		return nil
	})
	if err != nil {
		return Report{}, err
	}
	fn := float64(n)
	rep.Reconstruction = sumRec / fn
	rep.KL = sumKL / fn
	rep.NegELBO = rep.Reconstruction + rep.KL
	if klDim != nil {
		for j := range klDim {
			klDim[j] /= fn
		}
		rep.KLPerDim = klDim
	}
	if k >= 2 {
		rep.NLL = sumIW / fn
	}
	rep.MeanVariance = columnVariance(means, n, d)
	for _, v := range rep.MeanVariance {
		if v > ActiveThreshold {
			rep.ActiveUnits++
		}
	}
	for name, v := range map[string]float64{"reconstruction": rep.Reconstruction, "KL": rep.KL} {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return rep, fmt.Errorf("vae.Evaluate: %s is %v: %w", name, v, ErrNonFinite)
		}
	}
	return rep, nil
}

// columnVariance returns the population variance of each column of the
// row-major (n, d) values, computed with a two-pass algorithm.
func columnVariance(v []float64, n, d int) []float64 {
	mean := make([]float64, d)
	for i := 0; i < n; i++ {
		for j := 0; j < d; j++ {
			mean[j] += v[i*d+j]
		}
	}
	for j := range mean {
		mean[j] /= float64(n)
	}
	out := make([]float64, d)
	for i := 0; i < n; i++ {
		for j := 0; j < d; j++ {
			e := v[i*d+j] - mean[j]
			out[j] += e * e
		}
	}
	for j := range out {
		out[j] /= float64(n)
	}
	return out
}

// ScoreOptions configures Score.
type ScoreOptions struct {
	// K of 0 or 1 scores each record by its negative ELBO from one posterior
	// sample; K >= 2 by the importance-weighted estimate of -log p(x)
	// with K samples, which is less noisy and closer to the true value.
	K int
	// Seed makes scores repeatable: record r's noise depends only on Seed
	// and r, so scores do not depend on batching or concurrency.
	Seed uint64
}

// Score returns one anomaly score per record: higher means less likely
// under the model. See ScoreOptions for the two scores.
func (m *Model) Score(ctx context.Context, data *dataset.Set, opt ScoreOptions) ([]float64, error) {
	return m.score(ctx, data, opt, defaultInferLimits())
}

func (m *Model) score(ctx context.Context, data *dataset.Set, opt ScoreOptions, lim inferLimits) ([]float64, error) {
	if err := m.checkData("Score", data); err != nil {
		return nil, err
	}
	if opt.K < 0 {
		return nil, fmt.Errorf("vae.Score: K: %d, want >= 0: %w", opt.K, layers.ErrInvalidArgument)
	}
	k := max(opt.K, 1)
	n := data.Len()
	if n == 0 {
		return nil, fmt.Errorf("vae.Score: data: no records: %w", layers.ErrInvalidArgument)
	}
	out := make([]float64, n)
	err := m.forChunks(ctx, kindEvaluate, n, k, lim, func(p *program, first int, idx []int) error {
		if err := m.runSampled(p, data, first, idx, opt.Seed); err != nil {
			return err
		}
		if k >= 2 {
			iw := p.values(p.iw)
			for i := range idx {
				out[first+i] = -iw[i]
			}
			return nil
		}
		ll, kl := p.values(p.logLik), p.values(p.kl)
		for i := range idx {
			out[first+i] = kl[i] - ll[i]
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// runSampled runs an evaluation program on records idx of data, the first
// of which is record first of the call, with the noise fillNoise draws for
// them from seed.
func (m *Model) runSampled(p *program, data *dataset.Set, first int, idx []int, seed uint64) error {
	if err := m.fillInputs(p, data, idx); err != nil {
		return err
	}
	fillNoise(p.eps, seed, first, len(idx), p.key.batch, p.key.k, m.latent)
	return p.run()
}
