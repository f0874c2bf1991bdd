package vae

import (
	"context"
	"fmt"

	"gonum.org/v1/gonum/mat"

	"lowerbound.dev/layers"
	"lowerbound.dev/vae/dataset"
)

// The inference methods on the lean path. Each is called with m.lean set,
// after the method has checked its arguments, and gives what the graph
// path gives (plan_test.go compares them).

// leanLimits are the bounds of the public inference methods: they run on
// the lean plan when the model has one.
func leanLimits() inferLimits {
	lim := defaultInferLimits()
	lim.lean = true
	return lim
}

// sampled runs r on the lean plan (see leanSampled) when lim allows and
// the model has one, else on the graphs (forSampled).
func (m *Model) sampled(ctx context.Context, r sampledRun, full bool, lim inferLimits, fn func(first int, c *sampledChunk) error) error {
	if lim.lean && m.lean != nil {
		return m.leanSampled(ctx, r, full, fn)
	}
	return m.forSampled(ctx, r, lim, fn)
}

// leanSampled is forSampled on the lean plan: it evaluates every record of
// r.data and calls fn once with all of them. With full, it also gathers
// the posterior means and, when the prior has a closed-form KL, the KL per
// dimension (what Evaluate needs; Score does not).
func (m *Model) leanSampled(ctx context.Context, r sampledRun, full bool, fn func(first int, c *sampledChunk) error) error {
	n, d := r.data.Len(), m.latent
	c := &sampledChunk{count: n, logLik: make([]float64, n), kl: make([]float64, n)}
	e := leanEval{k: r.k, seed: r.seed, keys: r.keys, mean: r.atMean, logLik: c.logLik, kl: c.kl}
	if r.k >= 2 && !r.atMean {
		c.iw = make([]float64, n)
		e.iw = c.iw
	}
	if full {
		c.mu = make([]float64, n*d)
		e.mu = c.mu
		if m.lean.closedKL() {
			c.klDim = make([]float64, n*d)
			e.klDim = c.klDim
		}
	}
	if err := m.lean.evaluate(ctx, r.data.Values(), r.data.Labels(), n, &e, defaultWorkers()); err != nil {
		return err
	}
	return fn(0, c)
}

// leanEncode is Encode on the lean plan.
func (m *Model) leanEncode(ctx context.Context, data *dataset.Set) (mean, sigma *mat.Dense, err error) {
	n, d := data.Len(), m.latent
	mean, sigma = mat.NewDense(n, d, nil), mat.NewDense(n, d, nil)
	if err := m.lean.encode(ctx, data.Values(), data.Labels(), n, mean.RawMatrix().Data, sigma.RawMatrix().Data); err != nil {
		return nil, nil, err
	}
	return mean, sigma, nil
}

// leanDecode is Decode on the lean plan, z already checked for shape.
func (m *Model) leanDecode(ctx context.Context, z mat.Matrix, labels []int) (*mat.Dense, error) {
	n, d := z.Dims()
	zs := make([]float64, n*d)
	for i := 0; i < n; i++ {
		for j := 0; j < d; j++ {
			v := z.At(i, j)
			if bad := m.unrepresentable(v); bad != "" {
				return nil, fmt.Errorf("vae.Decode: z: row %d, column %d: value %v %s: %w", i, j, v, bad, layers.ErrInvalidArgument)
			}
			zs[i*d+j] = v
		}
	}
	out := mat.NewDense(n, m.width, nil)
	if err := m.lean.decode(ctx, zs, labels, n, out.RawMatrix().Data); err != nil {
		return nil, err
	}
	return out, nil
}

// leanReconstruct is Reconstruct on the lean plan.
func (m *Model) leanReconstruct(ctx context.Context, data *dataset.Set) (*mat.Dense, error) {
	n := data.Len()
	out := mat.NewDense(n, m.width, nil)
	if err := m.lean.reconstruct(ctx, data.Values(), data.Labels(), n, out.RawMatrix().Data); err != nil {
		return nil, err
	}
	return out, nil
}
