package vae

// The lean inference path.
//
// A plan is the model's built-in parts compiled into a list of steps that
// compute on plain slices: matrix products through one function (gemm, in
// plan_gemm.go), elementwise loops for everything else, and per-goroutine
// scratch from a sync.Pool, so that a call in steady state allocates
// nothing. A plan holds the *layers.Param of every part, never a copy of
// the numbers: each call reads Param.Value under the model's engine read
// lock, exactly as the inference graphs do, so training, LoadWeights and
// Load need not tell the plan anything.
//
// It equals the graph path (see plan_test.go): the same formulas, in the
// same dtype for everything the graphs keep in the model's dtype (layer
// outputs, mu, log-variance, z), with the per-record sums formed in
// float64.
//
// Parts the plan does not know (a user's layer, likelihood or prior) make
// compilation report ErrNotLean; callers then use the graphs. A user layer
// joins the plan by implementing LeanLayer.

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"sync"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
)

// ErrNotLean is wrapped by the errors that say a model has a part the lean
// inference path cannot run (a user-written layer that does not implement
// LeanLayer, or a user-written likelihood or prior). The message names the
// part. The graph path serves such models.
var ErrNotLean = errors.New("vae: part not supported by the lean inference path")

// LeanLayer is the optional interface through which a user-written layer
// joins the lean inference path (the model's inference methods and the
// Scorer). A layer that does not implement it is still served, by the
// graphs.
//
// The contract:
//   - LeanShape maps the per-record input shape (without the batch axis:
//     {F} for flat rows, {C, H, W} for images) to the per-record output
//     shape, or returns an error when the layer cannot take that input.
//   - LeanForward32 and LeanForward64 compute rows records at once: in
//     holds rows*prod(input shape) values and out rows*prod(output shape),
//     both row-major with the record slowest, the layout the graphs use.
//     They must equal Forward (to rounding), write every value of out, read
//     the layer's parameters (Param.Value) at call time, keep neither slice
//     and be safe for concurrent calls. The model calls them under its
//     engine read lock, so parameters do not change during a call. To keep
//     scoring free of allocation they should allocate nothing.
type LeanLayer interface {
	layers.Layer
	LeanShape(in []int) ([]int, error)
	LeanForward32(in, out []float32, rows int)
	LeanForward64(in, out []float64, rows int)
}

// leanRows is the number of rows a plan step handles at once: records in
// the encoder, (record, sample) rows in the decoder. With 64 rows gonum's
// products stay on their serial path (no goroutines, no allocation) for
// every layer up to 192 units wide.
const leanRows = 64

// float is the element type of a plan: the model's dtype.
type float interface{ ~float32 | ~float64 }

// kernels are the dtype-specific functions a plan calls.
type kernels[T float] struct {
	gemm func(transA bool, m, n, k int, a []T, lda int, b []T, ldb int, c []T, ldc int)
	data func(t *tensor.Dense) []T
	// forward runs a LeanLayer in this dtype.
	forward func(l LeanLayer, in, out []T, rows int)
	// bernoulli returns log p(x|logits) of one record (see bernoulli32).
	bernoulli func(x, logits []T, cols []float64) float64
}

// leanOp is one compiled step of an encoder or decoder.
type leanOp[T float] interface {
	// width is the number of values per record the step writes.
	width() int
	// scratch is the number of scratch values the step needs.
	scratch() int
	// forward computes rows records from in into out.
	forward(k *kernels[T], in, out, tmp []T, rows int)
}

// likKind and priorKind name the built-in likelihoods and priors.
type likKind int

const (
	likBernoulli likKind = iota
	likGaussian
	likLearned
	likColumns // *losses.Columns, see plan_columns.go
)

type priorKind int

const (
	priorStandard priorKind = iota
	priorDiagonal
	priorMixture
	priorVamp
)

// headParams are the four parameters of a GaussianHead.
type headParams struct {
	in, d              int
	muW, muB, lvW, lvB *layers.Param
}

// planT is the plan in one dtype.
type planT[T float] struct {
	m       *Model
	k       kernels[T]
	f, d, c int // features, latent size, classes
	image   bool
	hw      int // H*W of an image input (the size of one label plane)
	encIn   int // values per record into the encoder (label included)
	enc     []leanOp[T]
	head    headParams
	dec     []leanOp[T]
	decIn   int // D + classes
	lik     likKind
	sigma   float64       // Gaussian
	logSig  *layers.Param // learned Gaussian
	cols    *colPlan      // columns likelihood
	outW    int           // decoder outputs per record: F, or the columns' OutputWidth
	prior   priorKind
	pParams []*layers.Param // diagonal: mean, logvar; mixture: logits, means, logvars; vamp: pseudo-inputs
	comps   int             // mixture or vamp components
	vampEnc []leanOp[T]
	vampIn  int // values per pseudo-input
	vampHd  headParams
	closed  bool // the prior has a closed-form KL
	maxW    int  // widest row of any step, values
	maxTmp  int
	pool    sync.Pool
}

// leanPlan is a model's compiled plan: exactly one of p32, p64 is set.
type leanPlan struct {
	p32 *planT[float32]
	p64 *planT[float64]
}

// leanPlan compiles the model's parts into a plan. It returns false, with
// an error wrapping ErrNotLean that names the part, when a part is not
// built in and does not implement LeanLayer. Compiling is cheap and reads
// no parameter values; the result is safe for concurrent use and stays
// valid for the life of the model (parameters are read at call time). New
// (and so Load) compiles it once into Model.lean.
func (m *Model) leanPlan() (*leanPlan, bool, error) {
	if m.dtype == tensor.Float32 {
		p, err := compilePlan(m, kernels[float32]{gemm: gemm32, data: (*tensor.Dense).Float32s, bernoulli: bernoulli32,
			forward: func(l LeanLayer, in, out []float32, rows int) { l.LeanForward32(in, out, rows) }})
		if err != nil {
			return nil, false, err
		}
		return &leanPlan{p32: p}, true, nil
	}
	p, err := compilePlan(m, kernels[float64]{gemm: gemm64, data: (*tensor.Dense).Float64s, bernoulli: bernoulli64,
		forward: func(l LeanLayer, in, out []float64, rows int) { l.LeanForward64(in, out, rows) }})
	if err != nil {
		return nil, false, err
	}
	return &leanPlan{p64: p}, true, nil
}

func notLean(part, format string, a ...any) error {
	return fmt.Errorf("%w: %s: %s", ErrNotLean, part, fmt.Sprintf(format, a...))
}

func compilePlan[T float](m *Model, k kernels[T]) (*planT[T], error) {
	cfg := m.cfg
	p := &planT[T]{m: m, k: k, f: m.width, d: m.latent, c: cfg.Classes, image: len(cfg.InputShape) == 3}
	inShape := append([]int(nil), cfg.InputShape...)
	if m.cols != nil {
		inShape[0] = m.cols.EncoderWidth() // see plan_columns.go
	}
	p.encIn = inShape[0] + p.c
	if p.image {
		p.hw = inShape[1] * inShape[2]
		inShape[0] += p.c
		p.encIn = p.f + p.c*p.hw
	} else {
		inShape[0] += p.c
	}
	p.maxW = max(p.encIn, p.f, p.d+p.c)
	var err error
	var shape []int
	if p.enc, shape, err = p.compileLayer("encoder", cfg.Encoder, inShape, nil); err != nil {
		return nil, err
	}
	if len(shape) != 1 {
		return nil, notLean("encoder", "output shape %v per record, want flat features", shape)
	}
	if p.head, err = compileHead(cfg.Head, shape[0]); err != nil {
		return nil, err
	}
	p.decIn = p.d + p.c
	if p.dec, shape, err = p.compileLayer("decoder", cfg.Decoder, []int{p.decIn}, nil); err != nil {
		return nil, err
	}
	p.outW = m.outWidth
	if prod(shape) != p.outW {
		return nil, notLean("decoder", "output shape %v per record, want %d values", shape, p.outW)
	}
	switch l := cfg.Likelihood.(type) {
	case losses.Bernoulli, *losses.Bernoulli:
		p.lik = likBernoulli
	case losses.Gaussian, *losses.Gaussian:
		spec, ok := losses.DescribeLikelihood(l)
		if !ok {
			return nil, notLean("likelihood", "%T", l)
		}
		p.lik, p.sigma = likGaussian, spec.Sigma
	case *losses.LearnedGaussian:
		ps := l.Params()
		if len(ps) != 1 || prod(ps[0].Value.Shape()) != p.f {
			return nil, notLean("likelihood", "learned Gaussian with %d parameters", len(ps))
		}
		p.lik, p.logSig = likLearned, ps[0]
	case *losses.Columns:
		p.lik = likColumns
		if p.cols, err = compileColumns(l, p.f); err != nil {
			return nil, err
		}
	default:
		return nil, notLean("likelihood", "%T is not built in", l)
	}
	switch pr := cfg.Prior.(type) {
	case *priors.StandardNormal:
		p.prior, p.closed = priorStandard, true
	case *priors.Diagonal:
		p.prior, p.closed, p.pParams = priorDiagonal, true, pr.Params()
	case *priors.Mixture:
		p.prior, p.pParams, p.comps = priorMixture, pr.Params(), pr.Components()
	case *priors.Vamp:
		p.prior, p.pParams, p.comps = priorVamp, pr.Params(), pr.Components()
		vs := pr.InputShape()
		p.vampIn = prod(vs)
		p.maxW = max(p.maxW, p.vampIn)
		if p.vampEnc, shape, err = p.compileLayer("VampPrior encoder", pr.Encoder(), vs, nil); err != nil {
			return nil, err
		}
		if len(shape) != 1 {
			return nil, notLean("VampPrior encoder", "output shape %v per record, want flat features", shape)
		}
		if p.vampHd, err = compileHead(pr.Head(), shape[0]); err != nil {
			return nil, err
		}
		if p.vampHd.d != p.d {
			return nil, notLean("VampPrior head", "latent size %d, model %d", p.vampHd.d, p.d)
		}
	default:
		return nil, notLean("prior", "%T is not built in", pr)
	}
	p.maxW = max(p.maxW, p.head.in)
	p.pool.New = func() any { return p.newWork() }
	return p, nil
}

func compileHead(h *layers.GaussianHead, in int) (headParams, error) {
	if h == nil {
		return headParams{}, notLean("head", "nil")
	}
	ps := h.Params()
	if h.In() != in || len(ps) != 4 {
		return headParams{}, notLean("head", "takes %d features, the encoder gives %d", h.In(), in)
	}
	return headParams{in: in, d: h.Latent(), muW: ps[0], muB: ps[1], lvW: ps[2], lvB: ps[3]}, nil
}

func prod(s []int) int {
	n := 1
	for _, v := range s {
		n *= v
	}
	return n
}

// compileLayer appends the steps of layer l, which takes records of shape
// in, to ops and returns them with the output shape.
func (p *planT[T]) compileLayer(part string, l layers.Layer, in []int, ops []leanOp[T]) ([]leanOp[T], []int, error) {
	bad := func(format string, a ...any) ([]leanOp[T], []int, error) {
		return nil, nil, notLean(part, format, a...)
	}
	add := func(op leanOp[T]) {
		ops = append(ops, op)
		p.maxW = max(p.maxW, op.width())
		p.maxTmp = max(p.maxTmp, op.scratch())
	}
	switch v := l.(type) {
	case *layers.Dense:
		if len(in) != 1 || in[0] != v.In() {
			return bad("dense layer %q takes (N, %d), has records of shape %v", v.Name(), v.In(), in)
		}
		add(&denseOp[T]{w: v.Weight(), b: v.Bias(), in: v.In(), out: v.Out(), act: layers.Identity})
		return ops, []int{v.Out()}, nil
	case *layers.MLP:
		c := v.Config()
		if len(in) != 1 || in[0] != c.Sizes[0] {
			return bad("MLP %q takes (N, %d), has records of shape %v", v.Name(), c.Sizes[0], in)
		}
		ds := v.Layers()
		for i, d := range ds {
			act := c.Activation
			if i+1 == len(ds) {
				act = c.Output
			}
			add(&denseOp[T]{w: d.Weight(), b: d.Bias(), in: d.In(), out: d.Out(), act: act})
		}
		return ops, []int{c.Sizes[len(c.Sizes)-1]}, nil
	case *layers.Sequential:
		shape := in
		var err error
		for _, sub := range v.Layers() {
			if ops, shape, err = p.compileLayer(part, sub, shape, ops); err != nil {
				return nil, nil, err
			}
		}
		return ops, shape, nil
	case layers.Activation:
		if !v.Valid() {
			return bad("unknown activation %q", string(v))
		}
		if v == layers.Identity {
			return ops, in, nil
		}
		// Fuse into a preceding step that ends without an activation.
		if n := len(ops); n > 0 {
			if prev, ok := ops[n-1].(*denseOp[T]); ok && prev.act == layers.Identity {
				prev.act = v
				return ops, in, nil
			}
			if prev, ok := ops[n-1].(*convOp[T]); ok && prev.act == layers.Identity {
				prev.act = v
				return ops, in, nil
			}
		}
		add(&actOp[T]{act: v, n: prod(in)})
		return ops, in, nil
	case *layers.Conv2D:
		c := v.Config()
		if len(in) != 3 || in[0] != c.In {
			return bad("conv layer %q takes (N, %d, H, W), has records of shape %v", v.Name(), c.In, in)
		}
		oh, ow, ok := v.OutputSize(in[1], in[2])
		if !ok {
			return bad("conv layer %q: input %dx%d is smaller than its kernel", v.Name(), in[1], in[2])
		}
		ps := v.Params()
		add(&convOp[T]{w: ps[0], b: ps[1], cfg: c, h: in[1], wd: in[2], oh: oh, ow: ow, act: c.Activation})
		return ops, []int{c.Out, oh, ow}, nil
	case *layers.Upsample:
		if len(in) != 3 {
			return bad("upsampling takes (N, C, H, W), has records of shape %v", in)
		}
		f := v.Factor()
		if f == 1 {
			return ops, in, nil
		}
		add(&upsampleOp[T]{c: in[0], h: in[1], w: in[2], f: f})
		return ops, []int{in[0], f * in[1], f * in[2]}, nil
	case *layers.Flatten:
		if len(in) < 1 {
			return bad("flatten of an empty shape")
		}
		return ops, []int{prod(in)}, nil
	case *layers.Reshape:
		to := v.Shape()
		if len(in) != 1 || prod(to) != in[0] {
			return bad("reshape to %v takes (N, %d), has records of shape %v", to, prod(to), in)
		}
		return ops, to, nil
	case LeanLayer:
		out, err := v.LeanShape(append([]int(nil), in...))
		if err != nil {
			return bad("%T: %v", v, err)
		}
		if len(out) == 0 || prod(out) < 1 {
			return bad("%T: output shape %v", v, out)
		}
		add(&userOp[T]{l: v, out: prod(out)})
		return ops, append([]int(nil), out...), nil
	case nil:
		return bad("nil layer")
	}
	return bad("%T is not built in and does not implement vae.LeanLayer", l)
}

// leanWork is one goroutine's scratch for a plan. Every slice is sized at
// creation for leanRows rows, so a call never grows it.
type leanWork[T float] struct {
	a, b, tmp []T
	x         []T // the records in the model's dtype, (rows, F)
	headW     []T // the head's two weights side by side
	headOut   []T // (rows, 2D)
	mu, lv    []T // (rows, D)
	z         []T // decoder input rows, (rows, D + classes)
	eps       []T // one row of noise
	zRec      []int
	out       []T       // decoder output rows, (rows, outW)
	col       *colWork  // columns likelihood scratch
	rowLL     []float64 // per decoder row
	rowLW     []float64 // per decoder row: log p(z) - log q(z|x)
	// per record of the current chunk
	sumLL, kl, mc []float64
	lse           []logSumExp // the importance weights, streamed
	klDim         []float64   // (rows, D)
	// per call
	likA, likB     []float64 // learned Gaussian: log-variance and precision per feature
	compMu, compLV []float64 // mixture or vamp components, (comps, D)
	compW          []float64 // log weights
	pcg            *rand.PCG
	rng            *rand.Rand
}

func (p *planT[T]) newWork() *leanWork[T] {
	r := leanRows
	w := &leanWork[T]{
		a: make([]T, r*p.maxW), b: make([]T, r*p.maxW), tmp: make([]T, p.maxTmp),
		x: make([]T, r*p.f), mu: make([]T, r*p.d), lv: make([]T, r*p.d), z: make([]T, r*p.decIn), eps: make([]T, p.d),
		zRec: make([]int, r), out: make([]T, r*p.outW), rowLL: make([]float64, r), rowLW: make([]float64, r),
		sumLL: make([]float64, r), kl: make([]float64, r), mc: make([]float64, r), lse: make([]logSumExp, r),
		klDim: make([]float64, r*p.d),
		headW: make([]T, max(p.head.in, p.vampHd.in)*2*p.d), headOut: make([]T, r*2*p.d),
	}
	if p.lik == likLearned {
		w.likA, w.likB = make([]float64, p.f), make([]float64, p.f)
	}
	if p.cols != nil {
		w.col = p.cols.newWork()
	}
	if p.comps > 0 {
		w.compMu, w.compLV = make([]float64, p.comps*p.d), make([]float64, p.comps*p.d)
		w.compW = make([]float64, p.comps)
	}
	w.pcg = rand.NewPCG(0, 0)
	w.rng = rand.New(w.pcg)
	return w
}

func (p *planT[T]) getWork() *leanWork[T]  { return p.pool.Get().(*leanWork[T]) }
func (p *planT[T]) putWork(w *leanWork[T]) { p.pool.Put(w) }

// featureMajorRows is the number of rows from which a chain of dense
// layers runs feature-major (see runFeatureMajor).
const featureMajorRows = 16

// featureMajorWidth is the widest layer of a chain that runs
// feature-major: the inner loop of a feature-major product runs along at
// most leanRows records, that of a row-major one along the layer's units,
// so wide layers run faster row-major.
const featureMajorWidth = 2 * leanRows

// denseChain reports whether ops holds only dense layers and activations,
// none wider than featureMajorWidth.
func denseChain[T float](ops []leanOp[T]) bool {
	for _, op := range ops {
		switch op.(type) {
		case *denseOp[T], *actOp[T]:
			if op.width() > featureMajorWidth {
				return false
			}
		default:
			return false
		}
	}
	return len(ops) > 0
}

// run applies ops to rows records held at the start of w.a and returns
// the slice that holds the result (in w.a or w.b).
func (p *planT[T]) run(ops []leanOp[T], w *leanWork[T], in []T, rows int) []T {
	if rows >= featureMajorRows && denseChain(ops) {
		return p.runFeatureMajor(ops, w, in, rows, true)
	}
	cur, next := in, w.b
	for i, op := range ops {
		out := next[:rows*op.width()]
		op.forward(&p.k, cur, out, w.tmp, rows)
		cur = out
		if i%2 == 0 {
			next = w.a
		} else {
			next = w.b
		}
	}
	return cur
}

// runFeatureMajor runs a chain of dense layers on the transposed batch,
// one row per feature and one column per record: each product is then
// W^T H^T, whose inner loop runs along the records (long and contiguous)
// instead of along a layer's units, which costs far fewer calls into the
// product's inner loop per record. With back, the result is transposed
// back to one row per record; without, it is returned feature-major.
func (p *planT[T]) runFeatureMajor(ops []leanOp[T], w *leanWork[T], in []T, rows int, back bool) []T {
	width := len(in) / rows
	cur, next := w.b[:len(in)], w.a
	transpose(cur, in, rows, width)
	for _, op := range ops {
		out := next[:rows*op.width()]
		switch o := op.(type) {
		case *denseOp[T]:
			o.forwardFM(&p.k, cur, out, rows)
		case *actOp[T]:
			copy(out, cur[:len(out)])
			activate(o.act, out)
		}
		cur, next = out, cur[:cap(cur)]
		width = op.width()
	}
	if !back {
		return cur
	}
	res := next[:rows*width]
	transpose(res, cur, width, rows)
	return res
}

// transpose writes the (c, r) transpose of the row-major (r, c) src into dst.
func transpose[T float](dst, src []T, r, c int) {
	for i := 0; i < r; i++ {
		row := src[i*c : (i+1)*c]
		for j, v := range row {
			dst[j*r+i] = v
		}
	}
}

// encodeRows encodes rows records already converted into w.x with their
// labels, leaving mu and the bounded log-variance in w.mu and w.lv.
func (p *planT[T]) encodeRows(w *leanWork[T], labels []int, rows int) {
	in := w.a[:rows*p.encIn]
	f, c := p.f, p.c
	switch {
	case p.cols != nil:
		p.encodeColumnRows(w, labels, rows, in)
	case c == 0:
		copy(in, w.x[:rows*f])
	case p.image:
		for i := 0; i < rows; i++ {
			row := in[i*p.encIn : (i+1)*p.encIn]
			copy(row, w.x[i*f:(i+1)*f])
			planes := row[f:]
			clear(planes)
			l := labels[i]
			for j := l * p.hw; j < (l+1)*p.hw; j++ {
				planes[j] = 1
			}
		}
	default:
		for i := 0; i < rows; i++ {
			row := in[i*p.encIn : (i+1)*p.encIn]
			copy(row, w.x[i*f:(i+1)*f])
			oneHot(row[f:], labels[i])
		}
	}
	if rows >= featureMajorRows && denseChain(p.enc) {
		hT := p.runFeatureMajor(p.enc, w, in, rows, false)
		p.headRowsFM(w, &p.head, hT, w.mu[:rows*p.d], w.lv[:rows*p.d], rows)
		return
	}
	h := p.run(p.enc, w, in, rows)
	p.headRows(w, &p.head, h, w.mu[:rows*p.d], w.lv[:rows*p.d], rows)
}

func oneHot[T float](dst []T, l int) {
	clear(dst)
	dst[l] = 1
}

// headRows computes mu and the soft-clamped log-variance of rows feature
// rows h. The two maps run as one product: their weights are copied side
// by side into scratch, (in, 2D), on every call (parameters may change
// between calls; the copy costs less than a second product).
func (p *planT[T]) headRows(w *leanWork[T], hp *headParams, h, mu, lv []T, rows int) {
	d := hp.d
	out := w.headOut[:rows*2*d]
	headRaw(&p.k, hp, headWeights(&p.k, hp, w.headW), h, out, rows)
	for r := 0; r < rows; r++ {
		copy(mu[r*d:(r+1)*d], out[r*2*d:r*2*d+d])
		for j, v := range out[r*2*d+d : (r+1)*2*d] {
			lv[r*d+j] = softClamp(v)
		}
	}
}

// headRaw writes the head's two maps of rows feature rows h side by side
// into out, (rows, 2D): mu, then the log-variance before its soft clamp.
// wt holds the two weights side by side (headWeights).
func headRaw[T float](k *kernels[T], hp *headParams, wt, h, out []T, rows int) {
	d, in := hp.d, hp.in
	mb, lb := k.data(hp.muB.Value), k.data(hp.lvB.Value)
	for r := 0; r < rows; r++ {
		copy(out[r*2*d:], mb[:d])
		copy(out[r*2*d+d:], lb[:d])
	}
	k.gemm(false, rows, 2*d, in, h, in, wt, 2*d, out, 2*d)
}

// headRowsFM is headRows on feature-major features hT, (in, rows).
func (p *planT[T]) headRowsFM(w *leanWork[T], hp *headParams, hT, mu, lv []T, rows int) {
	d, in := hp.d, hp.in
	wt := headWeights(&p.k, hp, w.headW)
	mb, lb := p.k.data(hp.muB.Value), p.k.data(hp.lvB.Value)
	out := w.headOut[:rows*2*d]
	for j := 0; j < 2*d; j++ {
		bj := mb[j%d]
		if j >= d {
			bj = lb[j-d]
		}
		row := out[j*rows : (j+1)*rows]
		for i := range row {
			row[i] = bj
		}
	}
	p.k.gemm(true, 2*d, rows, in, wt, 2*d, hT, rows, out, rows)
	for j := 0; j < d; j++ {
		for r := 0; r < rows; r++ {
			mu[r*d+j] = out[j*rows+r]
			lv[r*d+j] = softClamp(out[(d+j)*rows+r])
		}
	}
}

// headWeights copies the head's two weights side by side into buf, (in,
// 2D), and returns that part of it.
func headWeights[T float](k *kernels[T], hp *headParams, buf []T) []T {
	d, in := hp.d, hp.in
	mw, lw := k.data(hp.muW.Value), k.data(hp.lvW.Value)
	wt := buf[:in*2*d]
	for i := 0; i < in; i++ {
		copy(wt[i*2*d:], mw[i*d:(i+1)*d])
		copy(wt[i*2*d+d:], lw[i*d:(i+1)*d])
	}
	return wt
}

// softClamp is layers.SoftClamp with the head's bounds:
// x + softplus(lo - x) - softplus(x - hi), formed in float64 and rounded
// once.
func softClamp[T float](x T) T {
	lv, _, _ := clampLogVar(float64(x))
	return T(lv)
}

// Constants of clampLogVar: e^lo and e^-hi for the head's bounds.
var (
	expLo    = math.Exp(layers.LogVarMin)
	expNegHi = math.Exp(-layers.LogVarMax)
)

// clampLogVar returns the head's log-variance lv = softClamp(x), its
// derivative slope = 1 - sigmoid(lo - x) - sigmoid(x - hi), and e^lv.
// Inside the bounds all three come from one exponential e = e^x: with
// u = e^(lo - x) = e^lo/e and v = e^(x - hi) = e*e^-hi,
//
//	lv = x + log1p(u) - log1p(v)
//	slope = 1 - u/(1 + u) - v/(1 + v)
//	e^lv = e (1 + u)/(1 + v)
//
// Outside them (or for NaN) it uses the forms that cannot overflow.
func clampLogVar(x float64) (lv, slope, expLV float64) {
	t1, t2 := layers.LogVarMin-x, x-layers.LogVarMax
	if t1 < 0 && t2 < 0 {
		e := math.Exp(x)
		u, v := expLo/e, e*expNegHi
		return x + math.Log1p(u) - math.Log1p(v), 1 - u/(1+u) - v/(1+v), e * (1 + u) / (1 + v)
	}
	lv = x + softplus(t1) - softplus(t2)
	return lv, 1 - sigmoid(t1) - sigmoid(t2), math.Exp(lv)
}

// klStandardTerm is one dimension's KL(N(mu, e^lv) || N(0, 1)) =
// 0.5*(e^lv + mu^2 - 1 - lv) (Kingma and Welling 2014, appendix B), given
// e^lv as expLV.
func klStandardTerm(mu, lv, expLV float64) float64 {
	return 0.5 * (expLV + mu*mu - 1 - lv)
}

// softplus is max(x, 0) + log1p(exp(-|x|)), exact and finite for every x.
func softplus(x float64) float64 {
	return math.Max(x, 0) + math.Log1p(math.Exp(-math.Abs(x)))
}

// decodeRows decodes rows decoder inputs held in w.z into w.out, the
// decoder's raw output (logits or means).
func (p *planT[T]) decodeRows(w *leanWork[T], rows int) []T {
	in := w.a[:rows*p.decIn]
	copy(in, w.z[:rows*p.decIn])
	out := p.run(p.dec, w, in, rows)
	copy(w.out[:rows*p.outW], out[:rows*p.outW])
	return w.out[:rows*p.outW]
}
