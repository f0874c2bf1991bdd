package vae

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"

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
	// samples. Zero means 1. Any K runs in bounded memory: the samples
	// are drawn and scored in chunks (see Score).
	K int
	// Seed makes the noise repeatable. The noise of a record depends only
	// on Seed and the record's key (see Keys and ScoreOptions.Keys).
	Seed uint64
	// Keys, when not nil, gives the noise key of every record (one per
	// record, in order). Nil means record i has key i, its index in the
	// data passed to the call. See ScoreOptions.Keys.
	Keys []uint64
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
	return m.evaluate(ctx, data, opt, leanLimits())
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
	if err := checkKeys("Evaluate", opt.Keys, n); err != nil {
		return Report{}, err
	}
	rep := Report{Records: n, K: k, NLL: math.NaN()}
	var klDim []float64
	means := make([]float64, 0, n*d)
	var sumRec, sumKL, sumIW float64
	run := sampledRun{data: data, k: k, seed: opt.Seed, keys: opt.Keys}
	err := m.sampled(ctx, run, true, lim, func(first int, c *sampledChunk) error {
		for i := 0; i < c.count; i++ {
			sumRec -= c.logLik[i]
			sumKL += c.kl[i]
		}
		means = append(means, c.mu...)
		if c.klDim != nil {
			if klDim == nil {
				klDim = make([]float64, d)
			}
			for i := 0; i < c.count; i++ {
				for j := 0; j < d; j++ {
					klDim[j] += c.klDim[i*d+j]
				}
			}
		}
		if c.iw != nil {
			for i := 0; i < c.count; i++ {
				sumIW -= c.iw[i]
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
	// with K samples (Burda et al. 2016), which is less noisy and closer to
	// the true value. Any K runs in bounded memory: the samples are drawn
	// and scored in chunks, and the chunks' importance weights are
	// combined with a streaming log-sum-exp.
	K int
	// Seed makes scores repeatable (see Keys).
	Seed uint64
	// Keys, when not nil, gives the noise key of every record (one per
	// record, in order; another length is an error). Nil means record i
	// has key i, its index in the data passed to the call.
	//
	// A record's noise depends only on Seed and its key: it is the K*D
	// standard normals drawn with NormFloat64 from
	// rand.New(rand.NewPCG(Seed, key)) (math/rand/v2), sample by sample
	// (sample 0, dimensions 0..D-1, then sample 1, ...). So a record's
	// score does not depend on batching, chunking, concurrency or the
	// other records of the call; a record scored alone with key i gets
	// the score it has as record i of a larger call with default keys.
	// Give each record a stable key (a row id, say) to make its score
	// reproducible wherever it is scored.
	Keys []uint64
	// AtPosteriorMean replaces the sampled score with a deterministic one,
	// evaluated at z = mu(x), the posterior mean, with no noise:
	//
	//	-log p(x | z = mu(x)) + KL(q(z|x) || p(z))
	//
	// where the KL is the prior's closed form (for the standard normal
	// prior, -1/2 sum_j (1 + log sigma_j^2 - mu_j^2 - sigma_j^2), Kingma and
	// Welling 2014, appendix B). For a prior without a closed-form KL the
	// second term is log q(mu(x)|x) - log p(mu(x)), the Monte Carlo KL
	// integrand at the mean, not the KL. This is not a bound on -log p(x);
	// it is a repeatable score for ranking records. K must then be 0 or
	// 1; Seed and Keys do not matter (Keys is still checked).
	AtPosteriorMean bool
}

// Score returns one anomaly score per record: higher means less likely
// under the model. See ScoreOptions for the scores. A score that comes
// out NaN is an error wrapping ErrNonFinite naming the record; a score
// can be +Inf (a record the model finds impossible at the working
// precision).
func (m *Model) Score(ctx context.Context, data *dataset.Set, opt ScoreOptions) ([]float64, error) {
	return m.score(ctx, data, opt, leanLimits())
}

func (m *Model) score(ctx context.Context, data *dataset.Set, opt ScoreOptions, lim inferLimits) ([]float64, error) {
	if err := m.checkData("Score", data); err != nil {
		return nil, err
	}
	if opt.K < 0 {
		return nil, fmt.Errorf("vae.Score: K: %d, want >= 0: %w", opt.K, layers.ErrInvalidArgument)
	}
	if opt.AtPosteriorMean && opt.K > 1 {
		return nil, fmt.Errorf("vae.Score: K: %d with AtPosteriorMean, want 0 or 1: %w", opt.K, layers.ErrInvalidArgument)
	}
	k := max(opt.K, 1)
	n := data.Len()
	if n == 0 {
		return nil, fmt.Errorf("vae.Score: data: no records: %w", layers.ErrInvalidArgument)
	}
	if err := checkKeys("Score", opt.Keys, n); err != nil {
		return nil, err
	}
	out := make([]float64, n)
	run := sampledRun{data: data, k: k, seed: opt.Seed, keys: opt.Keys, atMean: opt.AtPosteriorMean}
	err := m.sampled(ctx, run, false, lim, func(first int, c *sampledChunk) error {
		for i := 0; i < c.count; i++ {
			s := c.kl[i] - c.logLik[i]
			if k >= 2 {
				s = -c.iw[i]
			}
			if math.IsNaN(s) {
				return fmt.Errorf("vae.Score: record %d: score is NaN: %w", first+i, ErrNonFinite)
			}
			out[first+i] = s
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// checkKeys checks that keys is nil or has one key per record.
func checkKeys(where string, keys []uint64, n int) error {
	if keys != nil && len(keys) != n {
		return fmt.Errorf("vae.%s: Keys: have %d, want one per record (%d): %w", where, len(keys), n, layers.ErrInvalidArgument)
	}
	return nil
}

// sampledRun describes one Score or Evaluate call.
type sampledRun struct {
	data   *dataset.Set
	k      int
	seed   uint64
	keys   []uint64 // nil: record i has key i
	atMean bool     // zero noise: z is the posterior mean
}

func (r sampledRun) key(i int) uint64 {
	if r.keys != nil {
		return r.keys[i]
	}
	return uint64(i)
}

// sampledChunk holds the results for count consecutive records, each
// over all K samples.
type sampledChunk struct {
	count  int
	logLik []float64 // mean over the K samples of log p(x|z_s)
	kl     []float64 // closed-form KL, or the mean over the samples of log q - log p
	iw     []float64 // log (1/K) sum_s w_s; nil for K = 1
	mu     []float64 // (count, D) posterior means
	klDim  []float64 // (count, D) closed-form KL per dimension, or nil
	cols   []float64 // (count, C) mean over the samples of log p(x_j|z_s), columns models only
}

// kChunks splits K samples into the fewest chunks of at most limit
// samples, of sizes as equal as possible: it returns the chunk count c and
// the size of chunk i, k/c or k/c+1. With K >= 2 and limit >= 4 every chunk
// has at least 2 samples, so that each chunk's program computes importance
// weights.
func kChunks(k, limit int) (c int, size func(i int) int) {
	c = k / limit
	if k%limit != 0 {
		c++
	}
	return c, func(i int) int {
		if i < k%c {
			return k/c + 1
		}
		return k / c
	}
}

// forSampled runs the evaluation program over every record of r.data with
// r.k samples each and calls fn with the results of consecutive chunks of
// records. No program run handles more than lim.sampleRows rows (batch
// times samples, but at least one record and two samples): when K exceeds
// that, the samples of each record are split into chunks whose results
// are combined here, the importance weights with a streaming log-sum-exp.
// The context is checked before every run.
func (m *Model) forSampled(ctx context.Context, r sampledRun, lim inferLimits, fn func(first int, c *sampledChunk) error) error {
	if ctx == nil {
		ctx = context.Background()
	}
	rows := max(lim.sampleRows, 4)
	n, d, k := r.data.Len(), m.latent, r.k
	chunks, size := kChunks(k, rows)
	one := chunks == 1
	for first := 0; first < n; {
		b := inferBatch(n-first, size(0), rows)
		count := min(b, n-first)
		idx := make([]int, count)
		var rngs []*rand.Rand
		if !r.atMean {
			rngs = make([]*rand.Rand, count)
		}
		for i := range idx {
			idx[i] = first + i
			if rngs != nil {
				rngs[i] = rand.New(rand.NewPCG(r.seed, r.key(first+i)))
			}
		}
		c := &sampledChunk{count: count, logLik: make([]float64, count), kl: make([]float64, count)}
		// Per record, the log-sum-exp over the chunks of log sum_s w_s.
		var lse []logSumExp
		if k >= 2 {
			c.iw = make([]float64, count)
			lse = make([]logSumExp, count)
		}
		for ci := 0; ci < chunks; ci++ {
			kc := size(ci)
			if err := ctx.Err(); err != nil {
				return err
			}
			err := m.runChunk(programKey{kind: kindEvaluate, batch: b, k: kc}, r, lim, idx, rngs, func(o chunkOutputs) {
				for i := 0; i < count; i++ {
					if one {
						c.logLik[i], c.kl[i] = o.logLik[i], o.kl[i]
					} else {
						c.logLik[i] += o.logLik[i] * float64(kc) / float64(k)
						if o.klDim != nil {
							c.kl[i] = o.kl[i] // closed form: the same for every chunk
						} else {
							c.kl[i] += o.kl[i] * float64(kc) / float64(k)
						}
					}
					if lse != nil {
						if one {
							c.iw[i] = o.iw[i]
						} else {
							// log sum_s w_s over this chunk's samples.
							lse[i].add(o.iw[i] + math.Log(float64(kc)))
						}
					}
				}
				if o.cols != nil {
					nc := m.width
					if c.cols == nil {
						c.cols = make([]float64, count*nc)
					}
					for s := 0; s < kc; s++ {
						for i := 0; i < count; i++ {
							for j := 0; j < nc; j++ {
								c.cols[i*nc+j] += o.cols[(s*b+i)*nc+j] / float64(k)
							}
						}
					}
				}
				if ci == 0 {
					c.mu = o.mu[:count*d]
					if o.klDim != nil {
						c.klDim = o.klDim[:count*d]
					}
				}
			})
			if err != nil {
				return err
			}
		}
		if lse != nil && !one {
			for i := range c.iw {
				c.iw[i] = lse[i].value() - math.Log(float64(k)) // log (1/K) sum_s w_s
			}
		}
		if err := fn(first, c); err != nil {
			return err
		}
		first += count
	}
	return nil
}

// chunkOutputs holds one evaluation program run's outputs, per record of
// its batch (padding rows included).
type chunkOutputs struct {
	logLik, kl, iw, mu, klDim []float64
	cols                      []float64 // (K*B, C), columns models only
}

// runChunk runs the evaluation program of the given key on records idx of
// r.data with the next key.k samples of each record's noise from rngs (zero
// noise when rngs is nil), and passes its outputs to use.
func (m *Model) runChunk(key programKey, r sampledRun, lim inferLimits, idx []int, rngs []*rand.Rand, use func(chunkOutputs)) error {
	p, err := m.acquire(key)
	if err != nil {
		return err
	}
	defer m.release(p)
	if err := m.fillInputs(p, r.data, idx); err != nil {
		return err
	}
	fillNoise(p.eps, rngs, key.batch, key.k, m.latent)
	if lim.beforeRun != nil {
		lim.beforeRun(key)
	}
	m.engine.RLock()
	err = p.run()
	m.engine.RUnlock()
	if err != nil {
		return err
	}
	o := chunkOutputs{logLik: p.values(p.logLik), kl: p.values(p.kl), mu: p.values(p.mu)}
	if p.iw != nil {
		o.iw = p.values(p.iw)
	}
	if p.klDim != nil {
		o.klDim = p.values(p.klDim)
	}
	if p.colLP != nil {
		o.cols = p.values(p.colLP)
	}
	use(o)
	return nil
}

// logSumExp accumulates log sum_i exp(t_i) over terms added one at a time,
// in constant memory and without overflow: top is the largest term so far
// and sum the sum of exp(t_i - top) (the streaming form of the usual
// max-shift; common practice). The zero value holds no terms.
type logSumExp struct {
	top, sum float64
	any      bool
}

func (l *logSumExp) add(t float64) {
	switch {
	case !l.any:
		l.top, l.sum, l.any = t, 1, true
	case math.IsNaN(t) || math.IsNaN(l.top):
		l.top = math.NaN()
	case math.IsInf(t, -1) || math.IsInf(l.top, 1):
		// exp(t) = 0 adds nothing; an infinite sum stays infinite.
	case t > l.top:
		l.sum = l.sum*math.Exp(l.top-t) + 1
		l.top = t
	default:
		l.sum += math.Exp(t - l.top)
	}
}

// value returns log sum_i exp(t_i): -Inf for no terms or when every term
// is -Inf.
func (l *logSumExp) value() float64 {
	switch {
	case !l.any:
		return math.Inf(-1)
	case math.IsInf(l.top, 0) || math.IsNaN(l.top):
		return l.top
	}
	return l.top + math.Log(l.sum)
}
