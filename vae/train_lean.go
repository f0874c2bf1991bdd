package vae

// The lean training path.
//
// For a model whose parts are all built in and simple enough (dense
// encoder and decoder chains, the Gaussian head, the standard normal prior,
// any built-in likelihood: Bernoulli, Gaussian with a fixed or learned
// sigma, or a columns likelihood over mixed records with missing entries;
// with or without class labels), Train runs each step on plain slices
// instead of a gorgonia graph: the forward pass with the lean inference
// plan's compiled layers and formulas (plan.go), then the backward pass
// written out below, with every buffer allocated once per Train call. The
// products go through gorgonia's current BLAS (G.WhichBLAS), as the
// graphs' fused Dense ops do, so G.Use still chooses the library.
//
// Every derivative is one of the graph path's, taken from the same code
// where the graphs have a kernel for it (layers.Activation's gradients,
// vecmath's Bernoulli kernels, losses.Columns.GradRow) and written out
// where the graphs compose gorgonia's elementwise ops (the sampler, the
// soft clamp, the KL, free bits, capacity, the learned Gaussian).
// train_lean_test.go checks the result against the graph path (gorgonia's
// symbolic differentiation) step for step, and the gradients against
// central finite differences (gonum diff/fd).
//
// Any other model trains on the graphs; LeanPaths says why.

import (
	"errors"
	"fmt"
	"math"
	"runtime"

	"gonum.org/v1/gonum/blas"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/internal/vecmath"
	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/vae/dataset"
)

// ErrNotLeanTrain is wrapped by the errors that say why a model trains on
// gorgonia graphs instead of the lean training path (see LeanPaths).
var ErrNotLeanTrain = errors.New("vae: model not supported by the lean training path")

// LeanPaths reports which of the model's work runs without gorgonia
// graphs: its inference methods (Encode, Score, Evaluate, a Scorer, ...)
// when inference is nil, and Train when training is nil. A non-nil error
// names the part that keeps that work on the graphs and wraps ErrNotLean or
// ErrNotLeanTrain. The graph paths give the same results, more slowly.
func (m *Model) LeanPaths() (inference, training error) {
	if m.lean == nil {
		return m.leanWhy, fmt.Errorf("%w: %v", ErrNotLeanTrain, m.leanWhy)
	}
	if p := m.lean.p32; p != nil {
		return nil, trainable(p)
	}
	return nil, trainable(m.lean.p64)
}

// leanTrainer is one Train call's lean step: the plan it runs and every
// buffer a step needs, sized for the batch.
type leanTrainer interface {
	// step runs the forward and backward pass of one batch, records idx
	// of data with the noise eps (at least len(idx) rows of D). It writes
	// the gradient of every parameter into grads() and returns the batch
	// means of log p(x|z) and of the KL, and the loss.
	step(data *dataset.Set, idx []int, eps *tensor.Dense, s stepScalars) (recon, kl, loss float64, err error)
	// update sums the shards' gradients, clips them to clip (when > 0,
	// see clipGradients) and applies opt to the parameters, the trainer's
	// workers each taking a share of every parameter.
	update(opt updater, clip float64) (bad int, err error)
	// params and grads list the trained parameters and their gradient
	// buffers, in one order; the gradients are the whole batch's after
	// update (or after step, with one shard).
	params() []*layers.Param
	grads() []*tensor.Dense
	// start readies the trainer's helper goroutine, if it has one; close
	// stops it. step runs between them.
	start()
	close()
}

// stepScalars are the per-step constants of the objective.
type stepScalars struct {
	beta     float64
	freeBits bool
	lambda   float64 // free bits per latent dimension
	capacity bool
	gamma    float64 // capacity weight
	target   float64 // capacity C(step)
}

// newLeanTrainer returns the lean trainer of m for batches of up to batch
// records, or an error wrapping ErrNotLeanTrain that says why the model
// trains on the graphs.
func (m *Model) newLeanTrainer(batch int) (leanTrainer, error) {
	if m.lean == nil {
		return nil, fmt.Errorf("%w: %v", ErrNotLeanTrain, m.leanWhy)
	}
	if p := m.lean.p32; p != nil {
		t, err := newTrainPlan(p, batch, func(tA, tB bool, mm, n, k int, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
			G.WhichBLAS().Sgemm(trans(tA), trans(tB), mm, n, k, 1, a, lda, b, ldb, beta, c, ldc)
		}, layers.Activation.GradFloat32, vecmath.BernoulliRowSum32, vecmath.BernoulliGradRow32)
		if err != nil {
			return nil, err
		}
		return t, nil
	}
	t, err := newTrainPlan(m.lean.p64, batch, func(tA, tB bool, mm, n, k int, a []float64, lda int, b []float64, ldb int, beta float64, c []float64, ldc int) {
		G.WhichBLAS().Dgemm(trans(tA), trans(tB), mm, n, k, 1, a, lda, b, ldb, beta, c, ldc)
	}, layers.Activation.GradFloat64, vecmath.BernoulliRowSum64, vecmath.BernoulliGradRow64)
	if err != nil {
		return nil, err
	}
	return t, nil
}

func trans(t bool) blas.Transpose {
	if t {
		return blas.Trans
	}
	return blas.NoTrans
}

// trainChain is an encoder or decoder: dense layers and activations, with
// the output of every step kept for the backward pass.
type trainChain[T float] struct {
	ops  []leanOp[T]
	outs [][]T           // per op, (rows, width)
	gW   []*tensor.Dense // per op: weight gradient (nil for an activation)
	gB   []*tensor.Dense
}

// trainShards is the number of parts a batch of at least
// minShardBatch*trainShards records is split into. The parts run on two
// goroutines when GOMAXPROCS allows (two independent products keep two
// cores busy, where one product split in two does not pay at these
// sizes), else one after the other; their gradients are summed in a fixed
// order. The split depends on the batch size alone, so a run gives the
// same bits on any number of cores.
const (
	trainShards   = 2
	minShardBatch = 32
)

// trainPlan is leanTrainer in one dtype.
type trainPlan[T float] struct {
	p     *planT[T]
	k     kernels[T] // p's kernels, products through G.WhichBLAS
	gemm  func(tA, tB bool, m, n, k int, a []T, lda int, b []T, ldb int, beta T, c []T, ldc int)
	agrad func(a layers.Activation, d, y, g []T)
	bSum  func(x, l []T) float64
	bGrad func(out, x, l []T, g T)

	shards []*trainShard[T]
	ps     []*layers.Param
	// likParam is the likelihood's raw log sigmas (a learned Gaussian's or
	// a columns likelihood's), nil when it has none.
	likParam *layers.Param
	values   []*tensor.Dense // the parameters' values, in the order of ps
	// the step in progress, read by the shards
	data       *dataset.Set
	idx        []int
	eps        []T
	n          float64        // records in the step
	part       func(part int) // phaseUpdate's work
	runPartsFn func(func(part int))
	reduceFn   func(j, lo, hi int)
	klDimAvg   []float64
	coef       []float64 // (D): d loss / d klDim[i][j] for every record i
	invVar     T         // Gaussian likelihood: 1 / sigma^2
	// a second goroutine runs shard 1's phases when GOMAXPROCS > 1
	helper *handoff
}

// trainShard is one part of a batch: records [first, first+rows) of the
// step, with every buffer its forward and backward pass need and its own
// gradient of every parameter (shard 0's are the step's).
type trainShard[T float] struct {
	first, rows int
	x           []T // (rows, F): the shard's records in the model's dtype
	xAny        any // x, boxed once: Fill takes an any
	enc, dec    trainChain[T]
	gs          []*tensor.Dense
	gMuW, gMuB  *tensor.Dense
	gLvW, gLvB  *tensor.Dense
	gLik        *tensor.Dense // the likelihood parameter's gradient
	// lw holds the plan's per-call likelihood constants (prepare) and,
	// for a columns likelihood, one record's float64 scratch; dOut64 and
	// dLs are GradRow's outputs, dLsSum the shard's sum of dLs scaled.
	lw          *leanWork[T]
	dOut64      []float64
	dLs, dLsSum []float64
	encX        []T // (rows, encIn): records and one-hot labels
	headW       []T // (in, 2D): the head's two weights side by side
	headOut     []T // (rows, 2D): mu and the raw log-variance
	sigma       []T // (rows, D): exp(lv/2), lv the clamped log-variance
	slope       []T // (rows, D): the soft clamp's derivative
	decX        []T // (rows, D + classes): z and one-hot labels
	dHead       []T // (rows, 2D): gradient with respect to headOut
	dA, dB      []T // (rows, widest step): backward scratch
	dz          []T // the gradient with respect to decX (in dA or dB)
	in, hin     []T // this step's encoder input and head input
	err         error
	// sums over the shard's records
	ll, kl float64
	klDim  []float64 // (D)
}

func newTrainPlan[T float](p *planT[T], batch int,
	gemm func(tA, tB bool, m, n, k int, a []T, lda int, b []T, ldb int, beta T, c []T, ldc int),
	agrad func(a layers.Activation, d, y, g []T), bSum func(x, l []T) float64, bGrad func(out, x, l []T, g T)) (*trainPlan[T], error) {
	if err := trainable(p); err != nil {
		return nil, err
	}
	t := &trainPlan[T]{p: p, k: p.k, gemm: gemm, agrad: agrad, bSum: bSum, bGrad: bGrad,
		klDimAvg: make([]float64, p.d), coef: make([]float64, p.d)}
	switch {
	case p.lik == likLearned:
		t.likParam = p.logSig
	case p.cols != nil:
		t.likParam = p.cols.learned
	}
	t.k.gemm = func(transA bool, m, n, k int, a []T, lda int, b []T, ldb int, c []T, ldc int) {
		gemm(transA, false, m, n, k, a, lda, b, ldb, 1, c, ldc)
	}
	if p.lik == likGaussian {
		t.invVar = T(1 / (p.sigma * p.sigma))
	}
	shards := 1
	if batch >= trainShards*minShardBatch {
		shards = trainShards
	}
	for i := 0; i < shards; i++ {
		first, last := i*batch/shards, (i+1)*batch/shards
		t.shards = append(t.shards, t.newShard(first, last-first, i == 0))
	}
	for _, prm := range t.ps {
		t.values = append(t.values, prm.Value)
	}
	return t, nil
}

// trainable returns nil when the lean training path runs p's model, else
// an error wrapping ErrNotLeanTrain that says why it does not.
func trainable[T float](p *planT[T]) error {
	why := func(format string, a ...any) error {
		return fmt.Errorf("%w: %s", ErrNotLeanTrain, fmt.Sprintf(format, a...))
	}
	switch {
	case p.image:
		return why("image input")
	case p.prior != priorStandard:
		return why("a prior other than the standard normal")
	}
	// Every parameter of the model must be one this path trains.
	mine := map[*layers.Param]bool{p.head.muW: true, p.head.muB: true, p.head.lvW: true, p.head.lvB: true}
	for _, ops := range [][]leanOp[T]{p.enc, p.dec} {
		for _, op := range ops {
			switch o := op.(type) {
			case *denseOp[T]:
				mine[o.w], mine[o.b] = true, true
			case *actOp[T]:
			default:
				return why("a %T step", op)
			}
		}
	}
	switch {
	case p.lik == likLearned:
		mine[p.logSig] = true
	case p.cols != nil && p.cols.learned != nil:
		mine[p.cols.learned] = true
	}
	for _, prm := range p.m.params {
		if !mine[prm] {
			return why("parameter %q belongs to no dense layer, head or likelihood", prm.Name)
		}
	}
	return nil
}

// newShard allocates a shard of up to rows records; the first one also
// lists the parameters.
func (t *trainPlan[T]) newShard(first, rows int, first0 bool) *trainShard[T] {
	p := t.p
	s := &trainShard[T]{first: first, rows: rows}
	newGrad := func(prm *layers.Param) *tensor.Dense {
		g := tensor.New(tensor.WithShape(prm.Value.Shape().Clone()...), tensor.Of(prm.Value.Dtype()))
		if first0 {
			t.ps = append(t.ps, prm)
		}
		s.gs = append(s.gs, g)
		return g
	}
	maxW := 0
	chain := func(ops []leanOp[T], width int) trainChain[T] {
		c := trainChain[T]{ops: ops}
		maxW = max(maxW, width)
		for _, op := range ops {
			var gw, gb *tensor.Dense
			if o, ok := op.(*denseOp[T]); ok {
				gw, gb = newGrad(o.w), newGrad(o.b)
			}
			c.outs = append(c.outs, make([]T, rows*op.width()))
			c.gW, c.gB = append(c.gW, gw), append(c.gB, gb)
			maxW = max(maxW, op.width())
		}
		return c
	}
	s.enc = chain(p.enc, p.encIn)
	h := &p.head
	s.gMuW, s.gMuB, s.gLvW, s.gLvB = newGrad(h.muW), newGrad(h.muB), newGrad(h.lvW), newGrad(h.lvB)
	s.dec = chain(p.dec, p.decIn)
	if t.likParam != nil {
		s.gLik = newGrad(t.likParam)
	}
	s.lw = p.newWork()
	s.dOut64 = make([]float64, p.outW)
	s.dLs, s.dLsSum = make([]float64, p.f), make([]float64, p.f)
	d := p.d
	maxW = max(maxW, h.in, 2*d, p.outW)
	s.x = make([]T, rows*p.f)
	s.xAny = s.x
	if p.c > 0 || p.cols != nil {
		s.encX = make([]T, rows*p.encIn)
	}
	s.headW, s.headOut, s.dHead = make([]T, h.in*2*d), make([]T, rows*2*d), make([]T, rows*2*d)
	s.sigma, s.slope, s.decX = make([]T, rows*d), make([]T, rows*d), make([]T, rows*p.decIn)
	s.dA, s.dB = make([]T, rows*maxW), make([]T, rows*maxW)
	s.klDim = make([]float64, d)
	return s
}

func (t *trainPlan[T]) params() []*layers.Param { return t.ps }
func (t *trainPlan[T]) grads() []*tensor.Dense  { return t.shards[0].gs }

// start starts the goroutine of shard 1 when there is one and GOMAXPROCS
// allows; close stops it.
func (t *trainPlan[T]) start() {
	if len(t.shards) > 1 && runtime.GOMAXPROCS(0) > 1 {
		t.helper = newHandoff(func(phase int) { t.phase(1, phase) })
	}
}

func (t *trainPlan[T]) close() {
	if t.helper != nil {
		t.helper.close()
		t.helper = nil
	}
}

// The phases of a step, run on every shard: the forward pass and the
// decoder's backward pass; the rest of the backward pass (which needs the
// whole batch's KL for free bits and capacity); adding the other shards'
// gradients into shard 0's (only before clipping: otherwise the optimiser's
// pass does it), shard i taking the i-th run of every gradient's values;
// the optimiser's pass, the same way.
const (
	phaseForward = iota
	phaseBackward
	phaseReduce
	phaseUpdate // t.part(shard)
)

// all runs phase on every shard, in parallel when the goroutine runs.
func (t *trainPlan[T]) all(phase int) {
	if t.helper != nil {
		t.helper.post(phase)
		t.phase(0, phase)
		t.helper.wait()
		return
	}
	for i := range t.shards {
		t.phase(i, phase)
	}
}

func (t *trainPlan[T]) phase(i, phase int) {
	s := t.shards[i]
	if phase == phaseUpdate {
		t.part(i)
		return
	}
	if s.rows == 0 && phase != phaseReduce {
		// A batch of one record leaves shard 0 empty: it adds nothing.
		for _, g := range s.gs {
			clear(t.k.data(g))
		}
		s.ll, s.kl = 0, 0
		clear(s.klDim)
		return
	}
	switch phase {
	case phaseForward:
		t.forwardShard(s)
	case phaseBackward:
		t.backwardShard(s)
	case phaseReduce:
		// Shard i adds up the i-th run of every gradient's values.
		for j, g := range s.gs {
			lo, hi := partRange(g.Size(), i, len(t.shards))
			t.reduce(j, lo, hi)
		}
	}
}

// reduce adds the other shards' gradients of parameter j, values [lo, hi),
// into shard 0's.
func (t *trainPlan[T]) reduce(j, lo, hi int) {
	dst := t.k.data(t.shards[0].gs[j])[lo:hi]
	for _, o := range t.shards[1:] {
		src := t.k.data(o.gs[j])[lo:hi]
		for e, v := range src {
			dst[e] += v
		}
	}
}

// forward runs c on rows records in and returns its output.
func (t *trainPlan[T]) forward(c *trainChain[T], in []T, rows int) []T {
	cur := in
	for i, op := range c.ops {
		out := c.outs[i][:rows*op.width()]
		op.forward(&t.k, cur, out, nil, rows)
		cur = out
	}
	return cur
}

// backward takes g, the gradient with respect to c's output (rows
// records, in s.dA or s.dB), through c: it writes the parameters'
// gradients and, with wantIn, returns the gradient with respect to c's
// input (in s.dA or s.dB).
func (t *trainPlan[T]) backward(s *trainShard[T], c *trainChain[T], in, g []T, rows int, wantIn bool) []T {
	for i := len(c.ops) - 1; i >= 0; i-- {
		x := in
		if i > 0 {
			x = c.outs[i-1][:rows*c.ops[i-1].width()]
		}
		switch o := c.ops[i].(type) {
		case *actOp[T]:
			t.agrad(o.act, g, c.outs[i][:len(g)], g)
		case *denseOp[T]:
			t.agrad(o.act, g, c.outs[i][:len(g)], g) // g becomes the pre-activation gradient
			t.gemm(true, false, o.in, o.out, rows, x, o.in, g, o.out, 0, t.k.data(c.gW[i]), o.out)
			colSums(t.k.data(c.gB[i]), g, rows, o.out)
			if i == 0 && !wantIn {
				return nil
			}
			next := s.other(g)[:rows*o.in]
			t.gemm(false, true, rows, o.in, o.out, g, o.out, t.k.data(o.w.Value), o.out, 0, next, o.in)
			g = next
		}
	}
	return g
}

// other returns the scratch buffer g is not in.
func (s *trainShard[T]) other(g []T) []T {
	if len(g) > 0 && &g[0] == &s.dA[0] {
		return s.dB
	}
	return s.dA
}

// colSums sets s[j] to the sum of column j of the (rows, cols) d.
func colSums[T float](s, d []T, rows, cols int) {
	clear(s[:cols])
	for r := 0; r < rows; r++ {
		for j, v := range d[r*cols : (r+1)*cols] {
			s[j] += v
		}
	}
}

func (t *trainPlan[T]) update(opt updater, clip float64) (int, error) {
	if t.runPartsFn == nil {
		// bound once: a method value allocates
		t.runPartsFn, t.reduceFn = t.runParts, t.reduce
	}
	before := t.reduceFn
	switch {
	case len(t.shards) == 1:
		before = nil
	case clip > 0:
		// The norm needs every gradient summed first.
		t.all(phaseReduce)
		before = nil
	}
	if clip > 0 {
		clipGradients(t.grads(), clip)
	}
	return opt.stepParts(t.values, t.grads(), len(t.shards), t.runPartsFn, before)
}

// runParts runs fn once for each shard, on the shards' goroutines.
func (t *trainPlan[T]) runParts(fn func(part int)) {
	t.part = fn
	t.all(phaseUpdate)
	t.part = nil
}

func (t *trainPlan[T]) step(data *dataset.Set, idx []int, epst *tensor.Dense, sc stepScalars) (recon, klAvg, loss float64, err error) {
	p := t.p
	rows := len(idx)
	t.data, t.idx, t.eps = data, idx, t.k.data(epst)[:rows*p.d]
	t.n = float64(rows)
	for i, s := range t.shards {
		s.first = i * rows / len(t.shards)
		s.rows = (i+1)*rows/len(t.shards) - s.first
	}
	t.all(phaseForward)
	for _, s := range t.shards {
		if s.err != nil {
			return 0, 0, 0, s.err
		}
	}

	var ll, klSum float64
	clear(t.klDimAvg)
	for _, s := range t.shards {
		ll += s.ll
		klSum += s.kl
		for j, v := range s.klDim {
			t.klDimAvg[j] += v
		}
	}
	n := t.n
	recon, klAvg = ll/n, klSum/n
	for j := range t.klDimAvg {
		t.klDimAvg[j] /= n
	}
	// The objective, as the graphs build it: loss = -(recon - beta*klTerm)
	// + gamma*|klAvg - C|, klTerm the KL floored per dimension by free bits
	// (losses.FreeBits: 0.5*(k + lambda + |k - lambda|), whose gradient
	// gorgonia takes as 0.5*(1 + sign(k - lambda))).
	klTerm := klAvg
	if sc.freeBits {
		klTerm = 0
		for j, k := range t.klDimAvg {
			klTerm += 0.5 * ((k + sc.lambda) + math.Abs(k-sc.lambda))
			t.coef[j] = sc.beta * 0.5 * (1 + sign(k-sc.lambda)) / n
		}
	} else {
		for j := range t.coef {
			t.coef[j] = sc.beta / n
		}
	}
	loss = -(recon - sc.beta*klTerm)
	if sc.capacity {
		gap := klAvg - sc.target
		loss += sc.gamma * math.Abs(gap)
		for j := range t.coef {
			t.coef[j] += sc.gamma * sign(gap) / n
		}
	}
	t.all(phaseBackward)
	return recon, klAvg, loss, nil
}

// forwardShard runs the forward pass of s's records, the likelihood's
// gradient and the decoder's backward pass.
func (t *trainPlan[T]) forwardShard(s *trainShard[T]) {
	p := t.p
	f, d, c, rows := p.f, p.d, p.c, s.rows
	eps := t.eps[s.first*d : (s.first+rows)*d]
	idx := t.idx[s.first : s.first+rows]
	x := s.x[:rows*f]
	if s.err = t.data.Fill(s.xAny, idx); s.err != nil {
		return
	}

	// Encoder and head (plan.go's headRows, keeping the raw log-variance).
	s.in = x
	switch {
	case p.cols != nil:
		// The model-input layout (losses.Columns.EncodeRow) of the record
		// in the model's dtype, as plan_columns.go's encodeColumnRows
		// writes it.
		s.in = s.encX[:rows*p.encIn]
		cw, encW := s.lw.col, p.cols.encW
		for i := 0; i < rows; i++ {
			row := s.in[i*p.encIn : (i+1)*p.encIn]
			widen(cw.x, x[i*f:(i+1)*f])
			p.cols.c.EncodeRow(cw.x, cw.enc)
			toT(row[:encW], cw.enc)
			if c > 0 {
				oneHot(row[encW:], t.data.Label(idx[i]))
			}
		}
	case c > 0:
		s.in = s.encX[:rows*p.encIn]
		for i := 0; i < rows; i++ {
			row := s.in[i*p.encIn : (i+1)*p.encIn]
			copy(row, x[i*f:(i+1)*f])
			oneHot(row[f:], t.data.Label(idx[i]))
		}
	}
	s.hin = t.forward(&s.enc, s.in, rows)
	hp := &p.head
	out := s.headOut[:rows*2*d]
	headRaw(&t.k, hp, headWeights(&t.k, hp, s.headW), s.hin, out, rows)

	// Sampler, z = mu + exp(lv/2) * eps (layers.Reparameterize), and KL.
	sig, slope, zin := s.sigma[:rows*d], s.slope[:rows*d], s.decX[:rows*p.decIn]
	s.kl = 0
	clear(s.klDim)
	for r := 0; r < rows; r++ {
		mu := out[r*2*d : r*2*d+d]
		raw := out[r*2*d+d : (r+1)*2*d]
		sr, slr, er := sig[r*d:(r+1)*d], slope[r*d:(r+1)*d], eps[r*d:(r+1)*d]
		zr := zin[r*p.decIn : (r+1)*p.decIn]
		for j := 0; j < d; j++ {
			l, sl, el := clampLogVar(float64(raw[j]))
			slr[j] = T(sl)
			sr[j] = T(math.Sqrt(el)) // e^(lv/2)
			zr[j] = mu[j] + sr[j]*er[j]
			v := klStandardTerm(float64(mu[j]), l, el)
			s.klDim[j] += v
			s.kl += v
		}
		if c > 0 {
			oneHot(zr[d:], t.data.Label(idx[r]))
		}
	}

	// Decoder and likelihood; dOut = d loss / d output = -(1/n) d log p / d output.
	o := t.forward(&s.dec, zin, rows)
	ow := p.outW
	dOut := s.dA[:rows*ow]
	s.ll = 0
	g := T(-1 / t.n)
	p.prepare(s.lw) // a learned or columns likelihood's log sigmas, as inference reads them
	clear(s.dLsSum)
	for r := 0; r < rows; r++ {
		xr, or, dr := x[r*f:(r+1)*f], o[r*ow:(r+1)*ow], dOut[r*ow:(r+1)*ow]
		switch p.lik {
		case likBernoulli:
			s.ll += t.bSum(xr, or)
			t.bGrad(dr, xr, or, g)
		case likGaussian:
			s.ll += p.logLikRow(nil, xr, or, nil)
			gv := g * t.invVar
			for j, m := range or {
				dr[j] = gv * (xr[j] - m)
			}
		case likLearned:
			// log p = -0.5*(log 2pi + lv + (x - m)^2 e^-lv), lv = 2 log sigma:
			// d/dm = (x - m) e^-lv, d/dlog sigma = (x - m)^2 e^-lv - 1.
			s.ll += p.logLikRow(s.lw, xr, or, nil)
			for j, m := range or {
				dv, prec := float64(xr[j])-float64(m), s.lw.likB[j]
				dr[j] = T(float64(g) * dv * prec)
				s.dLsSum[j] += float64(g) * (dv*dv*prec - 1)
			}
		case likColumns:
			cw := s.lw.col
			widen(cw.x, xr)
			widen(cw.out, or)
			ll, _ := p.cols.c.GradRow(cw.x, cw.out, cw.ls, cw.lp, s.dOut64, s.dLs) // lengths fixed at compile time
			s.ll += ll
			for k, v := range s.dOut64 {
				dr[k] = T(float64(g) * v)
			}
			for j, v := range s.dLs {
				s.dLsSum[j] += float64(g) * v
			}
		}
	}
	if s.gLik != nil {
		// log sigma = MinLogSigma + softplus(r - MinLogSigma) of the raw
		// parameter r (boundedLogSigma): d/dr = sigmoid(r - MinLogSigma).
		// Columns that do not learn their sigma have dLs = 0.
		r, gr := t.k.data(t.likParam.Value), t.k.data(s.gLik)
		for j, v := range s.dLsSum {
			gr[j] = T(v * sigmoid(float64(r[j]-T(losses.MinLogSigma))))
		}
	}
	s.dz = t.backward(s, &s.dec, zin, dOut, rows, true)
}

// backwardShard takes s's gradient through the sampler and the KL into
// the head and the encoder.
func (t *trainPlan[T]) backwardShard(s *trainShard[T]) {
	p := t.p
	d, rows := p.d, s.rows
	out, dh := s.headOut[:rows*2*d], s.dHead[:rows*2*d]
	eps := t.eps[s.first*d : (s.first+rows)*d]
	for r := 0; r < rows; r++ {
		mu := out[r*2*d : r*2*d+d]
		sr, slr, er := s.sigma[r*d:(r+1)*d], s.slope[r*d:(r+1)*d], eps[r*d:(r+1)*d]
		dzr := s.dz[r*p.decIn : r*p.decIn+d]
		dmu, draw := dh[r*2*d:r*2*d+d], dh[r*2*d+d:(r+1)*2*d]
		for j := 0; j < d; j++ {
			cj := t.coef[j]
			sg := float64(sr[j])
			// d/dmu and d/dlv of the KL's 0.5*(e^lv + mu^2 - 1 - lv) and
			// of z = mu + e^(lv/2) eps.
			dmu[j] = dzr[j] + T(cj*float64(mu[j]))
			dlv := dzr[j]*er[j]*sr[j]*0.5 + T(cj*0.5*(sg*sg-1))
			draw[j] = dlv * slr[j]
		}
	}
	// Head: dW = h^T [dmu | draw], one product per weight reading half of
	// dh's columns; d h = [dmu | draw] [Wmu | Wlv]^T.
	hw := p.head.in
	t.gemm(true, false, hw, d, rows, s.hin, hw, dh, 2*d, 0, t.k.data(s.gMuW), d)
	t.gemm(true, false, hw, d, rows, s.hin, hw, dh[d:], 2*d, 0, t.k.data(s.gLvW), d)
	gmb, glb := t.k.data(s.gMuB), t.k.data(s.gLvB)
	clear(gmb)
	clear(glb)
	for r := 0; r < rows; r++ {
		for j := 0; j < d; j++ {
			gmb[j] += dh[r*2*d+j]
			glb[j] += dh[r*2*d+d+j]
		}
	}
	if len(s.enc.ops) > 0 {
		gh := s.other(s.dz)[:rows*hw]
		t.gemm(false, true, rows, hw, 2*d, dh, 2*d, s.headW[:hw*2*d], 2*d, 0, gh, hw)
		t.backward(s, &s.enc, s.in, gh, rows, false)
	}
}

func sign(v float64) float64 {
	switch {
	case v > 0:
		return 1
	case v < 0:
		return -1
	}
	return 0
}
