package vae

import (
	"context"
	"math"
	"runtime"
	"sync"

	"lowerbound.dev/internal/vecmath"
)

// leanEval describes one evaluation through a plan and receives its
// results. Every output slice may be nil; those given have one entry per
// record (klDim and mu: D per record, cols: F per record).
type leanEval struct {
	k    int    // samples per record, >= 1
	seed uint64 // noise seed
	// keys holds the noise key of every record; nil means the record's
	// index in the call.
	keys []uint64
	// mean scores at the posterior mean without noise (k and the keys
	// do not matter): the reconstruction term at z = mu and the
	// closed-form KL, or log q(mu|x) - log p(mu) when the prior has none
	// (see ScoreOptions.AtPosteriorMean).
	mean bool

	logLik []float64 // log p(x|z), averaged over the samples
	kl     []float64 // closed-form KL, or the Monte Carlo estimate (at z = mu with mean)
	klDim  []float64 // closed-form KL per dimension (left alone when the prior has none)
	iw     []float64 // importance-weighted log p(x) estimate (k >= 2)
	score  []float64 // -iw for k >= 2, else kl - logLik
	mu     []float64 // posterior means
	cols   []float64 // -log p(x_j|z) per feature, averaged over the samples
}

// evaluate runs e over n records of x (n*F values, already checked) with
// their labels, holding the engine read lock for the whole call. With
// workers > 1 and enough records the chunks are shared among that many
// goroutines; results do not depend on it.
func (p *planT[T]) evaluate(ctx context.Context, x []float64, labels []int, n int, e *leanEval, workers int) error {
	p.m.engine.RLock()
	defer p.m.engine.RUnlock()
	chunks := (n + leanRows - 1) / leanRows
	workers = min(workers, chunks)
	if workers <= 1 {
		w := p.getWork()
		defer p.putWork(w)
		p.prepare(w)
		for c := 0; c < chunks; c++ {
			if err := ctx.Err(); err != nil {
				return err
			}
			if err := p.evalChunk(ctx, w, x, labels, c*leanRows, min(leanRows, n-c*leanRows), e); err != nil {
				return err
			}
		}
		return nil
	}
	return p.evaluateParallel(ctx, x, labels, n, *e, workers, chunks)
}

// evaluateParallel splits the chunks into workers contiguous ranges, one
// goroutine each, with no shared state but the outputs (disjoint). It takes
// e by value so that the single-goroutine path keeps e on the caller's
// stack.
func (p *planT[T]) evaluateParallel(ctx context.Context, x []float64, labels []int, n int, e leanEval, workers, chunks int) error {
	var wg sync.WaitGroup
	errs := make([]error, workers)
	for g := 0; g < workers; g++ {
		from, to := g*chunks/workers, (g+1)*chunks/workers
		wg.Add(1)
		go func() {
			defer wg.Done()
			w := p.getWork()
			defer p.putWork(w)
			p.prepare(w)
			for c := from; c < to; c++ {
				if err := ctx.Err(); err != nil {
					errs[g] = err
					return
				}
				if err := p.evalChunk(ctx, w, x, labels, c*leanRows, min(leanRows, n-c*leanRows), &e); err != nil {
					errs[g] = err
					return
				}
			}
		}()
	}
	wg.Wait()
	for _, err := range errs {
		if err != nil {
			return err
		}
	}
	return nil
}

// defaultWorkers is the number of goroutines a large call uses.
func defaultWorkers() int { return runtime.GOMAXPROCS(0) }

// toT converts float64 values into the plan's dtype.
func toT[T float](dst []T, src []float64) {
	for i, v := range src {
		dst[i] = T(v)
	}
}

// evalChunk evaluates records first..first+n-1 (n <= leanRows).
func (p *planT[T]) evalChunk(ctx context.Context, w *leanWork[T], x []float64, labels []int, first, n int, e *leanEval) error {
	f, d, c := p.f, p.d, p.c
	toT(w.x[:n*f], x[first*f:(first+n)*f])
	var lab []int
	if c > 0 {
		lab = labels[first : first+n]
	}
	p.encodeRows(w, lab, n)
	k := e.k
	for i := 0; i < n; i++ {
		w.sumLL[i], w.mc[i], w.lse[i] = 0, 0, logSumExp{}
		w.kl[i] = 0
		if p.closed {
			w.kl[i] = p.klRow(w, w.mu[i*d:(i+1)*d], w.lv[i*d:(i+1)*d], w.klDim[i*d:(i+1)*d])
		}
	}
	if e.cols != nil {
		clear(e.cols[first*f : (first+n)*f])
	}
	if e.mean {
		// The reconstruction term at z = mu.
		for i := 0; i < n; i++ {
			p.setZRow(w, i, w.mu[i*d:(i+1)*d], lab, i)
		}
		p.flush(w, e, first, n, 1, false)
		if !p.closed {
			// The Monte Carlo KL's integrand at z = mu, without noise.
			for i := 0; i < n; i++ {
				mu := w.mu[i*d : (i+1)*d]
				w.mc[i] = p.logQ(mu, mu, w.lv[i*d:(i+1)*d]) - p.logPrior(w, mu)
			}
		}
		k = 1
	} else {
		dens := k > 1 || !p.closed
		rows := 0
		for i := 0; i < n; i++ {
			p.seed(w, e, first+i)
			for s := 0; s < k; s++ {
				z := p.sample(w, i)
				p.setZRow(w, rows, z, lab, i)
				w.zRec[rows] = i
				rows++
				if rows == leanRows {
					p.flush(w, e, first, rows, k, dens)
					rows = 0
					// Large K: stop between blocks of rows too.
					if err := ctx.Err(); err != nil {
						return err
					}
				}
			}
		}
		if rows > 0 {
			p.flush(w, e, first, rows, k, dens)
		}
	}
	fk := float64(k)
	for i := 0; i < n; i++ {
		r := first + i
		ll := w.sumLL[i] / fk
		kl := w.kl[i]
		if !p.closed {
			kl = w.mc[i] / fk
		}
		iw := math.NaN()
		if k >= 2 {
			iw = w.lse[i].value() - math.Log(fk) // log (1/K) sum_s w_s
		}
		if e.logLik != nil {
			e.logLik[r] = ll
		}
		if e.kl != nil {
			e.kl[r] = kl
		}
		if e.iw != nil {
			e.iw[r] = iw
		}
		if e.score != nil {
			if k >= 2 {
				e.score[r] = -iw
			} else {
				e.score[r] = kl - ll
			}
		}
		if e.klDim != nil && p.closed {
			copy(e.klDim[r*d:(r+1)*d], w.klDim[i*d:(i+1)*d])
		}
		if e.mu != nil {
			for j := 0; j < d; j++ {
				e.mu[r*d+j] = float64(w.mu[i*d+j])
			}
		}
	}
	if e.cols != nil && k > 1 {
		for j := range e.cols[first*f : (first+n)*f] {
			e.cols[first*f+j] /= fk
		}
	}
	return nil
}

// seed restarts the noise generator for record r of the call: the stream
// of rand.New(rand.NewPCG(seed, key)).
func (p *planT[T]) seed(w *leanWork[T], e *leanEval, r int) {
	key := uint64(r)
	if e.keys != nil {
		key = e.keys[r]
	}
	w.pcg.Seed(e.seed, key)
}

// sample draws one z for record i of the chunk, z = mu + exp(lv/2) * eps
// with D standard normals from the current stream, into w.eps (returned).
func (p *planT[T]) sample(w *leanWork[T], i int) []T {
	d := p.d
	mu, lv := w.mu[i*d:(i+1)*d], w.lv[i*d:(i+1)*d]
	z := w.eps
	for j := 0; j < d; j++ {
		eps := T(w.rng.NormFloat64())
		sigma := T(math.Exp(float64(lv[j] * 0.5)))
		z[j] = mu[j] + sigma*eps
	}
	return z
}

// setZRow writes z and the one-hot label of record i into decoder row row.
func (p *planT[T]) setZRow(w *leanWork[T], row int, z []T, lab []int, i int) {
	dst := w.z[row*p.decIn : (row+1)*p.decIn]
	copy(dst, z[:p.d])
	if p.c > 0 {
		oneHot(dst[p.d:], lab[i])
	}
}

// flush decodes rows decoder rows and folds their log-likelihoods (and,
// with dens, importance weights) into the per-record sums. Without a
// sampled row map (mean), row i belongs to record i.
func (p *planT[T]) flush(w *leanWork[T], e *leanEval, first, rows, k int, dens bool) {
	out := p.decodeRows(w, rows)
	f, d := p.f, p.d
	for r := 0; r < rows; r++ {
		i := r
		if !e.mean {
			i = w.zRec[r]
		}
		var cols []float64
		if e.cols != nil {
			cols = e.cols[(first+i)*f : (first+i+1)*f]
		}
		ll := p.logLikRow(w, w.x[i*f:(i+1)*f], out[r*p.outW:(r+1)*p.outW], cols)
		w.sumLL[i] += ll
		if !dens {
			continue
		}
		z := w.z[r*p.decIn : r*p.decIn+d]
		lq := p.logQ(z, w.mu[i*d:(i+1)*d], w.lv[i*d:(i+1)*d])
		lp := p.logPrior(w, z)
		if !p.closed {
			w.mc[i] += lq - lp
		}
		if k > 1 {
			w.lse[i].add(ll + lp - lq) // log w_s, Burda et al. 2016, eq. 8
		}
	}
}

const log2Pi = 1.83787706640934548356065947281123527972279494727556682563430308

// logLikRow returns log p(x|out) of one record and, when cols is given,
// adds -log p(x_j|out_j) to cols[j].
func (p *planT[T]) logLikRow(w *leanWork[T], x, out []T, cols []float64) float64 {
	var sum float64
	switch p.lik {
	case likColumns:
		return p.columnsLogLik(w, x, out, cols)
	case likBernoulli:
		sum = p.k.bernoulli(x, out, cols)
	case likGaussian:
		a, b := -0.5/(p.sigma*p.sigma), -math.Log(p.sigma)-0.5*log2Pi
		for j, mt := range out {
			dv := float64(x[j]) - float64(mt)
			v := dv*dv*a + b
			sum += v
			if cols != nil {
				cols[j] -= v
			}
		}
	case likLearned:
		for j, mt := range out {
			dv := float64(x[j]) - float64(mt)
			v := -0.5 * (log2Pi + w.likA[j] + dv*dv*w.likB[j])
			sum += v
			if cols != nil {
				cols[j] -= v
			}
		}
	}
	return sum
}

// bernoulli32 returns the Bernoulli log-likelihood of one record,
// sum_j x_j*l_j - softplus(l_j), from its logits, and subtracts each term
// from cols[j] when cols is given. Each term is computed as the graphs'
// float32 Bernoulli op computes it (losses/bernoulli_op.go): in float32,
// softplus(l) = max(l, 0) + log1p(exp(-|l|)) with vecmath.Log1pExp32, and
// summed in float64.
func bernoulli32(x, logits []float32, cols []float64) float64 {
	var sum float64
	for j, l := range logits {
		relu, negAbs := l, -l
		if l < 0 {
			relu, negAbs = 0, l
		}
		v := float64((x[j]*l - relu) - vecmath.Log1pExp32(negAbs))
		sum += v
		if cols != nil {
			cols[j] -= v
		}
	}
	return sum
}

// bernoulli64 is bernoulli32 in float64, with the formula of the graphs'
// float64 op.
func bernoulli64(x, logits []float64, cols []float64) float64 {
	var sum float64
	for j, l := range logits {
		v := (x[j]*l - math.Max(l, 0)) - math.Log1p(math.Exp(-math.Abs(l)))
		sum += v
		if cols != nil {
			cols[j] -= v
		}
	}
	return sum
}

// logQ returns log N(z; mu, diag(exp(lv))).
func (p *planT[T]) logQ(z, mu, lv []T) float64 {
	var s float64
	for j := range z {
		dv := float64(z[j]) - float64(mu[j])
		l := float64(lv[j])
		s += -0.5 * (log2Pi + l + dv*dv*math.Exp(-l))
	}
	return s
}

// logPrior returns log p(z).
func (p *planT[T]) logPrior(w *leanWork[T], z []T) float64 {
	switch p.prior {
	case priorStandard:
		var s float64
		for _, v := range z {
			f := float64(v)
			s += -0.5 * (f*f + log2Pi)
		}
		return s
	case priorDiagonal:
		m, v := p.k.data(p.pParams[0].Value), p.k.data(p.pParams[1].Value)
		var s float64
		for j := range z {
			dv := float64(z[j]) - float64(m[j])
			l := float64(v[j])
			s += -0.5 * (log2Pi + l + dv*dv*math.Exp(-l))
		}
		return s
	}
	// Mixture or VampPrior: log sum_k w_k N(z; mu_k, diag(exp(lv_k))),
	// with the stable streaming log-sum-exp over the components.
	d := p.d
	var lse logSumExp
	for c := 0; c < p.comps; c++ {
		v := w.compW[c]
		mu, lv := w.compMu[c*d:(c+1)*d], w.compLV[c*d:(c+1)*d]
		for j := range z {
			dv := float64(z[j]) - mu[j]
			v += -0.5 * (log2Pi + lv[j] + dv*dv*math.Exp(-lv[j]))
		}
		lse.add(v)
	}
	return lse.value()
}

// klRow returns the closed-form KL(q || p) of one record and writes its
// terms per dimension into dims.
func (p *planT[T]) klRow(w *leanWork[T], mu, lv []T, dims []float64) float64 {
	var s float64
	switch p.prior {
	case priorStandard:
		for j := range mu {
			m, l := float64(mu[j]), float64(lv[j])
			v := klStandardTerm(m, l, math.Exp(l))
			dims[j] = v
			s += v
		}
	case priorDiagonal:
		pm, pv := p.k.data(p.pParams[0].Value), p.k.data(p.pParams[1].Value)
		for j := range mu {
			l2 := float64(pv[j])
			dlv := float64(lv[j]) - l2
			dm := float64(mu[j]) - float64(pm[j])
			v := 0.5 * (math.Exp(dlv) - dlv + dm*dm*math.Exp(-l2) - 1)
			dims[j] = v
			s += v
		}
	}
	return s
}

// prepare computes what a call needs once: the learned likelihood's
// per-feature constants and the mixture or VampPrior components.
func (p *planT[T]) prepare(w *leanWork[T]) {
	if p.lik == likLearned {
		r := p.k.data(p.logSig.Value)
		for j := 0; j < p.f; j++ {
			// log sigma = MinLogSigma + softplus(r - MinLogSigma), in the
			// model's dtype as losses.LearnedGaussian computes it.
			ls := boundedLogSigma(r[j])
			lv := float64(ls * 2)
			w.likA[j], w.likB[j] = lv, math.Exp(-lv)
		}
	}
	if p.lik == likColumns {
		p.prepareColumns(w)
	}
	switch p.prior {
	case priorMixture:
		logits := p.k.data(p.pParams[0].Value)
		means, lvs := p.k.data(p.pParams[1].Value), p.k.data(p.pParams[2].Value)
		var l logSumExp
		for _, v := range logits[:p.comps] {
			l.add(float64(v))
		}
		lse := l.value()
		for c := 0; c < p.comps; c++ {
			w.compW[c] = float64(logits[c]) - lse
		}
		for i := range w.compMu {
			w.compMu[i], w.compLV[i] = float64(means[i]), float64(lvs[i])
		}
	case priorVamp:
		u := p.k.data(p.pParams[0].Value)
		lw := -math.Log(float64(p.comps))
		d := p.d
		for c0 := 0; c0 < p.comps; c0 += leanRows {
			rows := min(leanRows, p.comps-c0)
			in := w.a[:rows*p.vampIn]
			copy(in, u[c0*p.vampIn:(c0+rows)*p.vampIn])
			h := p.run(p.vampEnc, w, in, rows)
			p.headRows(w, &p.vampHd, h, w.mu[:rows*d], w.lv[:rows*d], rows)
			for i := 0; i < rows*d; i++ {
				w.compMu[c0*d+i], w.compLV[c0*d+i] = float64(w.mu[i]), float64(w.lv[i])
			}
		}
		for c := range w.compW {
			w.compW[c] = lw
		}
	}
}
