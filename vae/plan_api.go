package vae

import (
	"context"
	"math"
)

// The package-internal entry points of a compiled plan, on float64 slices.
// Inputs are checked by the caller (lengths, labels in range, finite
// values); each call takes the model's engine read lock itself, so a
// caller must not hold it.

// evaluate scores or evaluates n records of x, see leanEval.
func (lp *leanPlan) evaluate(ctx context.Context, x []float64, labels []int, n int, e *leanEval, workers int) error {
	if ctx == nil {
		ctx = context.Background()
	}
	if lp.p32 != nil {
		return lp.p32.evaluate(ctx, x, labels, n, e, workers)
	}
	return lp.p64.evaluate(ctx, x, labels, n, e, workers)
}

// encode writes the posterior mean and standard deviation of n records,
// (n, D) each, as Encode returns them. It stops with ctx's error between
// blocks of records.
func (lp *leanPlan) encode(ctx context.Context, x []float64, labels []int, n int, mean, sigma []float64) error {
	if lp.p32 != nil {
		return lp.p32.encode(ctx, x, labels, n, mean, sigma)
	}
	return lp.p64.encode(ctx, x, labels, n, mean, sigma)
}

// decode writes the likelihood mean (n, F) for n latent rows z (n, D), as
// Decode returns it.
func (lp *leanPlan) decode(ctx context.Context, z []float64, labels []int, n int, out []float64) error {
	if lp.p32 != nil {
		return lp.p32.decode(ctx, z, labels, n, out)
	}
	return lp.p64.decode(ctx, z, labels, n, out)
}

// reconstruct writes decode(posterior mean) (n, F) for n records, as
// Reconstruct returns it.
func (lp *leanPlan) reconstruct(ctx context.Context, x []float64, labels []int, n int, out []float64) error {
	if lp.p32 != nil {
		return lp.p32.reconstruct(ctx, x, labels, n, out)
	}
	return lp.p64.reconstruct(ctx, x, labels, n, out)
}

// closedKL reports whether the plan's prior has a closed-form KL (and so
// a KL per latent dimension).
func (lp *leanPlan) closedKL() bool {
	if lp.p32 != nil {
		return lp.p32.closed
	}
	return lp.p64.closed
}

func (p *planT[T]) encode(ctx context.Context, x []float64, labels []int, n int, mean, sigma []float64) error {
	p.m.engine.RLock()
	defer p.m.engine.RUnlock()
	w := p.getWork()
	defer p.putWork(w)
	f, d := p.f, p.d
	for first := 0; first < n; first += leanRows {
		if err := ctxErr(ctx); err != nil {
			return err
		}
		rows := min(leanRows, n-first)
		toT(w.x[:rows*f], x[first*f:(first+rows)*f])
		var lab []int
		if p.c > 0 {
			lab = labels[first : first+rows]
		}
		p.encodeRows(w, lab, rows)
		for i := 0; i < rows*d; i++ {
			mean[first*d+i] = float64(w.mu[i])
			sigma[first*d+i] = math.Exp(0.5 * float64(w.lv[i]))
		}
	}
	return nil
}

func (p *planT[T]) decode(ctx context.Context, z []float64, labels []int, n int, out []float64) error {
	p.m.engine.RLock()
	defer p.m.engine.RUnlock()
	w := p.getWork()
	defer p.putWork(w)
	d := p.d
	for first := 0; first < n; first += leanRows {
		if err := ctxErr(ctx); err != nil {
			return err
		}
		rows := min(leanRows, n-first)
		toT(w.mu[:rows*d], z[first*d:(first+rows)*d])
		p.meanRows(w, labels, first, rows, out)
	}
	return nil
}

func (p *planT[T]) reconstruct(ctx context.Context, x []float64, labels []int, n int, out []float64) error {
	p.m.engine.RLock()
	defer p.m.engine.RUnlock()
	w := p.getWork()
	defer p.putWork(w)
	f := p.f
	for first := 0; first < n; first += leanRows {
		if err := ctxErr(ctx); err != nil {
			return err
		}
		rows := min(leanRows, n-first)
		toT(w.x[:rows*f], x[first*f:(first+rows)*f])
		var lab []int
		if p.c > 0 {
			lab = labels[first : first+rows]
		}
		p.encodeRows(w, lab, rows)
		p.meanRows(w, labels, first, rows, out)
	}
	return nil
}

// ctxErr is ctx.Err(), and nil for a nil context.
func ctxErr(ctx context.Context) error {
	if ctx == nil {
		return nil
	}
	return ctx.Err()
}

// meanRows decodes the rows latent vectors in w.mu (records first...)
// and writes the likelihood mean into out.
func (p *planT[T]) meanRows(w *leanWork[T], labels []int, first, rows int, out []float64) {
	d, f := p.d, p.f
	var lab []int
	if p.c > 0 {
		lab = labels[first : first+rows]
	}
	for i := 0; i < rows; i++ {
		p.setZRow(w, i, w.mu[i*d:(i+1)*d], lab, i)
	}
	o := p.decodeRows(w, rows)
	dst := out[first*f : (first+rows)*f]
	if p.lik == likColumns {
		p.columnsMeanRows(w, o, dst, rows)
		return
	}
	if p.lik == likBernoulli {
		for i, v := range o {
			dst[i] = float64(T(sigmoid(float64(v))))
		}
		return
	}
	for i, v := range o {
		dst[i] = float64(v)
	}
}
