package vae

import (
	"fmt"
	"math"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
)

// A program is one compiled gorgonia graph with its machine and the tensors
// bound to its inputs. Programs are built once per (kind, batch, K) and
// reused: the caller fills the input tensors, runs the machine and reads the
// outputs. A program is used by one goroutine at a time (see pool.go).
type programKind int

const (
	kindTrain       programKind = iota // loss and gradients, K = 1
	kindEvaluate                       // ELBO parts and, for K > 1, the importance-weighted bound
	kindEncode                         // posterior mean and log-variance only
	kindDecode                         // z in, likelihood mean out
	kindReconstruct                    // x in, decode(posterior mean) out
	kindDecodeRaw                      // z in, decoder output out (no likelihood mean)
)

type programKey struct {
	kind  programKind
	batch int
	k     int
	// training only
	freeBits bool
	capacity bool
}

type program struct {
	key   programKey
	g     *G.ExprGraph
	vm    G.VM
	scope *layers.Scope

	// inputs
	x, xRep, y, yRep, planes, eps, z *tensor.Dense
	mask                             *tensor.Dense
	// xEnc is the encoder input of a columns model: the model-input
	// layout of x (losses.Columns.EncodeRow), filled by fillInputs.
	xEnc *tensor.Dense
	// scalar inputs, set with G.Let before each run; lambda is the free
	// bits floor per group (per dimension, or Lambda*D on the total)
	invCount, beta, capTarget, capGamma, lambda *G.Node

	// outputs
	mu, logVar, mean      *G.Node
	logLik, kl, klDim, iw *G.Node // logLik and kl per record, averaged over K
	loss, recon, klAvg    *G.Node // training: batch averages
	klDimAvg              *G.Node // training: (1, D) masked batch average per dimension
	klTerm                *G.Node // training: the KL term beta weighs (after free bits)
	colLP                 *G.Node // evaluation of a columns model: (K*B, C) log p(x_j|z)
	paramNodes            []*G.Node

	// reads holds copies of the output nodes' values, taken by gorgonia
	// Read statements as each is computed: after a run, the memory of an
	// intermediate node may already hold a later operation's result.
	reads map[*G.Node]*G.Value
}

func (m *Model) newInput(g *G.ExprGraph, name string, shape ...int) (*G.Node, *tensor.Dense) {
	t := tensor.New(tensor.WithShape(shape...), tensor.Of(m.dtype))
	n := G.NewTensor(g, m.dtype, len(shape), G.WithShape(shape...), G.WithName(name), G.WithValue(t))
	return n, t
}

// newScalar adds a scalar input, set before each run with setScalar.
func (m *Model) newScalar(g *G.ExprGraph, name string) *G.Node {
	n := G.NewScalar(g, m.dtype, G.WithName(name))
	_ = G.Let(n, castTo(m.dtype, 0))
	return n
}

func (m *Model) scalar(v float64) *G.Node {
	if m.dtype == tensor.Float32 {
		return G.NewConstant(float32(v))
	}
	return G.NewConstant(v)
}

// repeatRows returns the (K*B, C) node whose row k*B+b is row b of a (B, C):
// a column of K ones times a viewed as one row of B*C values, folded back.
// The matrix product keeps the gradient exact and costs K*B*C multiplies.
func (m *Model) repeatRows(g *G.ExprGraph, a *G.Node, k int) (*G.Node, error) {
	if k == 1 {
		return a, nil
	}
	s := a.Shape()
	b, c := s[0], s[1]
	ones := tensor.New(tensor.WithShape(k, 1), tensor.Of(m.dtype))
	if err := ones.Memset(castTo(m.dtype, 1)); err != nil {
		return nil, err
	}
	onesN := G.NewMatrix(g, m.dtype, G.WithShape(k, 1), G.WithValue(ones), G.WithName(fmt.Sprintf("ones_%d_%d", k, g.AllNodes().Len())))
	row, err := G.Reshape(a, tensor.Shape{1, b * c})
	if err != nil {
		return nil, err
	}
	rep, err := G.Mul(onesN, row)
	if err != nil {
		return nil, err
	}
	return G.Reshape(rep, tensor.Shape{k * b, c})
}

// build compiles a program. It is called with m.mu held or before the model
// is shared.
func (m *Model) build(key programKey) (*program, error) {
	m.builds[key.kind].Add(1)
	g := G.NewGraph()
	p := &program{key: key, g: g, scope: layers.NewScope(g)}
	b, k, d, f, c := key.batch, key.k, m.latent, m.width, m.cfg.Classes
	var err error
	wrap := func(what string, err error) error {
		return fmt.Errorf("vae: building the %s: %w", what, err)
	}
	// owns checks the parameters bound since its last call, by the part
	// just called: every one must be listed by the model's parts.
	checked := 0
	owns := func(part string) error {
		ps := p.scope.Params()
		for _, prm := range ps[checked:] {
			if !m.owned[prm] {
				return fmt.Errorf("%w: %s binds parameter %q in the graph but no part lists it in Params(): "+
					"it would be trained but never saved, snapshotted or restored", ErrConfig, part, prm.Name)
			}
		}
		checked = len(ps)
		return nil
	}

	var yN, yRepN *G.Node
	if c > 0 {
		yN, p.y = m.newInput(g, "label", b, c)
		if k > 1 && key.kind != kindDecode {
			yRepN, p.yRep = m.newInput(g, "label_rep", k*b, c)
		} else {
			yRepN = yN
		}
	}

	// decodeFrom maps latent rows (rows, D) to the decoder output, flat.
	decodeFrom := func(z, labels *G.Node, rows int) (*G.Node, error) {
		in := z
		if c > 0 {
			if in, err = G.Concat(1, z, labels); err != nil {
				return nil, wrap("decoder input", err)
			}
		}
		out, err := m.cfg.Decoder.Forward(p.scope, in)
		if err != nil {
			return nil, wrap("decoder", err)
		}
		if err := owns("Decoder"); err != nil {
			return nil, err
		}
		os, ow := out.Shape(), m.outWidth
		if os[0] != rows || os.TotalSize() != rows*ow {
			return nil, wrap("decoder", fmt.Errorf("output shape %v, want %d rows of %d values", os, rows, ow))
		}
		if os.Dims() != 2 {
			if out, err = G.Reshape(out, tensor.Shape{rows, ow}); err != nil {
				return nil, wrap("decoder output", err)
			}
		}
		return out, nil
	}

	if key.kind == kindDecode || key.kind == kindDecodeRaw {
		var zN *G.Node
		zN, p.z = m.newInput(g, "z", b, d)
		out, err := decodeFrom(zN, yN, b)
		if err != nil {
			return nil, err
		}
		if key.kind == kindDecodeRaw {
			if p.mean, err = G.Add(out, m.scalar(0)); err != nil {
				return nil, wrap("decoder output", err)
			}
			return p, m.compile(p, nil)
		}
		if p.mean, err = m.cfg.Likelihood.Mean(p.scope, out); err != nil {
			return nil, wrap("likelihood mean", err)
		}
		if err := owns("Likelihood"); err != nil {
			return nil, err
		}
		return p, m.compile(p, nil)
	}

	// Encoder.
	var xN *G.Node
	xN, p.x = m.newInput(g, "x", b, f)
	encIn := xN
	if m.cols != nil {
		encIn, p.xEnc = m.newInput(g, "x_enc", b, m.cols.EncoderWidth())
	}
	// No gradient with respect to the data is ever wanted: the first
	// layer and the likelihood skip building it.
	p.scope.MarkData(xN)
	p.scope.MarkData(encIn)
	if len(m.cfg.InputShape) == 3 {
		shape := append(tensor.Shape{b}, m.cfg.InputShape...)
		// Reshape an input through a copy: gorgonia's Reshape of an input
		// node shares the input's memory, and a later in-place operation
		// would write into it.
		xCopy, err := G.Add(xN, m.scalar(0))
		if err != nil {
			return nil, wrap("image input", err)
		}
		if encIn, err = G.Reshape(xCopy, shape); err != nil {
			return nil, wrap("image input", err)
		}
	}
	if c > 0 {
		if len(m.cfg.InputShape) == 3 {
			var planesN *G.Node
			planesN, p.planes = m.newInput(g, "label_planes", b, c, m.cfg.InputShape[1], m.cfg.InputShape[2])
			encIn, err = G.Concat(1, encIn, planesN)
		} else {
			encIn, err = G.Concat(1, encIn, yN)
		}
		if err != nil {
			return nil, wrap("conditional encoder input", err)
		}
	}
	h, err := m.cfg.Encoder.Forward(p.scope, encIn)
	if err != nil {
		return nil, wrap("encoder", err)
	}
	if err := owns("Encoder"); err != nil {
		return nil, err
	}
	if h.Shape().Dims() != 2 || h.Shape()[0] != b {
		return nil, wrap("encoder", fmt.Errorf("output shape %v, want (%d, H): end the encoder with a Flatten", h.Shape(), b))
	}
	if p.mu, p.logVar, err = m.cfg.Head.Forward(p.scope, h); err != nil {
		return nil, wrap("Gaussian head", err)
	}
	if err := owns("Head"); err != nil {
		return nil, err
	}

	switch key.kind {
	case kindEncode:
		return p, m.compile(p, nil)
	case kindReconstruct:
		out, err := decodeFrom(p.mu, yN, b)
		if err != nil {
			return nil, err
		}
		if p.mean, err = m.cfg.Likelihood.Mean(p.scope, out); err != nil {
			return nil, wrap("likelihood mean", err)
		}
		if err := owns("Likelihood"); err != nil {
			return nil, err
		}
		return p, m.compile(p, nil)
	}

	// Sample z, decode, and score.
	var epsN *G.Node
	epsN, p.eps = m.newInput(g, "eps", k*b, d)
	z, err := layers.Reparameterize(p.mu, p.logVar, epsN)
	if err != nil {
		return nil, wrap("sampler", err)
	}
	out, err := decodeFrom(z, yRepN, k*b)
	if err != nil {
		return nil, err
	}
	xRepN := xN
	if k > 1 {
		xRepN, p.xRep = m.newInput(g, "x_rep", k*b, f)
		p.scope.MarkData(xRepN)
	}
	var logLik *G.Node // (K*B)
	if m.cols != nil {
		colLP, err := m.cols.ColumnLogProb(p.scope, xRepN, out)
		if err != nil {
			return nil, wrap("likelihood", err)
		}
		if key.kind == kindEvaluate {
			p.colLP = colLP
		}
		if logLik, err = losses.PerSample(colLP); err != nil {
			return nil, wrap("likelihood", err)
		}
	} else if logLik, err = m.cfg.Likelihood.LogProb(p.scope, xRepN, out); err != nil {
		return nil, wrap("likelihood", err)
	}
	if err := owns("Likelihood"); err != nil {
		return nil, err
	}

	// KL: closed form when the prior has one, else the Monte Carlo
	// estimate log q(z|x) - log p(z) at the sampled z.
	var klSample *G.Node // (B)
	var logPZ, logQZ *G.Node
	needDensities := k > 1
	if cf, ok := m.cfg.Prior.(priors.ClosedFormKL); ok {
		if p.klDim, err = cf.KL(p.scope, p.mu, p.logVar); err != nil {
			return nil, wrap("prior KL", err)
		}
		if err := owns("Prior"); err != nil {
			return nil, err
		}
		if klSample, err = losses.PerSample(p.klDim); err != nil {
			return nil, wrap("KL", err)
		}
	} else {
		needDensities = true
	}
	if needDensities {
		if logPZ, err = m.cfg.Prior.LogProb(p.scope, z); err != nil {
			return nil, wrap("prior log-density", err)
		}
		if err := owns("Prior"); err != nil {
			return nil, err
		}
		muRep, err := m.repeatRows(g, p.mu, k)
		if err != nil {
			return nil, wrap("posterior mean", err)
		}
		lvRep, err := m.repeatRows(g, p.logVar, k)
		if err != nil {
			return nil, wrap("posterior log-variance", err)
		}
		qDim, err := losses.DiagGaussianLogProb(z, muRep, lvRep)
		if err != nil {
			return nil, wrap("posterior log-density", err)
		}
		if logQZ, err = losses.PerSample(qDim); err != nil {
			return nil, wrap("posterior log-density", err)
		}
		if klSample == nil {
			diff, err := G.Sub(logQZ, logPZ)
			if err != nil {
				return nil, wrap("Monte Carlo KL", err)
			}
			if klSample, err = meanOverSamples(diff, k, b); err != nil {
				return nil, wrap("Monte Carlo KL", err)
			}
		}
	}
	if p.logLik, err = meanOverSamples(logLik, k, b); err != nil {
		return nil, wrap("likelihood", err)
	}
	p.kl = klSample

	if key.kind == kindEvaluate {
		if k > 1 {
			lw, err := G.Sub(logLik, logQZ)
			if err == nil {
				lw, err = G.Add(lw, logPZ)
			}
			if err == nil {
				lw, err = G.Reshape(lw, tensor.Shape{k, b})
			}
			if err == nil {
				p.iw, err = losses.ImportanceWeighted(lw)
			}
			if err != nil {
				return nil, wrap("importance-weighted bound", err)
			}
		}
		return p, m.compile(p, nil)
	}

	// Training loss: masked batch means so that a ragged last batch runs
	// through the same graph with its padding rows weighted zero.
	var maskN *G.Node
	maskN, p.mask = m.newInput(g, "mask", b)
	p.invCount = m.newScalar(g, "inv_count")
	p.beta = m.newScalar(g, "beta")
	invN, betaN := p.invCount, p.beta
	masked := func(v *G.Node) (*G.Node, error) {
		w, err := G.HadamardProd(v, maskN)
		if err != nil {
			return nil, err
		}
		s, err := G.Sum(w)
		if err != nil {
			return nil, err
		}
		return G.Mul(s, invN)
	}
	if p.recon, err = masked(p.logLik); err != nil {
		return nil, wrap("loss", err)
	}
	if p.klAvg, err = masked(p.kl); err != nil {
		return nil, wrap("loss", err)
	}
	// The objective is built from the public pieces in losses, the same
	// functions their tests check: the KL term (floored by free bits when
	// configured), weighted by beta in the ELBO, and the capacity penalty.
	klTerm := p.klAvg
	if key.freeBits {
		p.lambda = m.newScalar(g, "free_bits")
		perGroup := p.klAvg // without a per-dimension KL: one group, the total
		if p.klDim != nil {
			// Free bits per latent dimension (Kingma et al. 2016) on
			// the masked batch mean of each dimension's KL, (1, D).
			maskRow, err := G.Reshape(maskN, tensor.Shape{1, b})
			if err == nil {
				p.klDimAvg, err = G.Mul(maskRow, p.klDim)
			}
			if err == nil {
				p.klDimAvg, err = G.Mul(p.klDimAvg, invN)
			}
			if err != nil {
				return nil, wrap("free bits", err)
			}
			perGroup = p.klDimAvg
		}
		if klTerm, err = losses.FreeBits(perGroup, p.lambda); err != nil {
			return nil, wrap("free bits", err)
		}
	}
	p.klTerm = klTerm
	elbo, err := losses.ELBO(p.recon, klTerm, betaN)
	if err != nil {
		return nil, wrap("loss", err)
	}
	if p.loss, err = G.Neg(elbo); err != nil {
		return nil, wrap("loss", err)
	}
	if key.capacity {
		// KL capacity (Burgess et al. 2018): gamma * |KL - C|.
		p.capTarget = m.newScalar(g, "capacity")
		p.capGamma = m.newScalar(g, "capacity_gamma")
		penalty, err := losses.CapacityPenalty(p.klAvg, p.capTarget, p.capGamma)
		if err == nil {
			p.loss, err = G.Add(p.loss, penalty)
		}
		if err != nil {
			return nil, wrap("capacity", err)
		}
	}
	p.paramNodes = p.scope.Nodes()
	if _, err := G.Grad(p.loss, p.paramNodes...); err != nil {
		return nil, wrap("gradients", err)
	}
	return p, m.compile(p, p.paramNodes)
}

// meanOverSamples maps a (K*B) vector to the (B) mean over the K samples.
func meanOverSamples(v *G.Node, k, b int) (*G.Node, error) {
	if k == 1 {
		return v, nil
	}
	r, err := G.Reshape(v, tensor.Shape{k, b})
	if err != nil {
		return nil, err
	}
	return G.Mean(r, 0)
}

func (m *Model) compile(p *program, dual []*G.Node) error {
	p.reads = map[*G.Node]*G.Value{}
	for _, n := range []*G.Node{p.mu, p.logVar, p.mean, p.logLik, p.kl, p.klDim, p.iw, p.loss, p.recon, p.klAvg, p.klDimAvg, p.klTerm, p.colLP} {
		if n == nil || p.reads[n] != nil {
			continue
		}
		slot := new(G.Value)
		G.Read(n, slot)
		p.reads[n] = slot
	}
	opts := []G.VMOpt{}
	if len(dual) > 0 {
		opts = append(opts, G.BindDualValues(dual...))
	}
	p.vm = G.NewTapeMachine(p.g, opts...)
	return nil
}

// run executes the program once. Gorgonia panics on some internal errors;
// they are turned into errors here so that no call into the model panics.
func (p *program) run() (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("vae: graph execution failed: %v", r)
		}
		p.vm.Reset()
	}()
	return p.vm.RunAll()
}

// values returns the value an output node had when it was computed, as
// float64s (a copy).
func (p *program) values(n *G.Node) []float64 {
	slot := p.reads[n]
	if slot == nil || *slot == nil {
		return nil
	}
	switch d := (*slot).Data().(type) {
	case []float64:
		return append([]float64(nil), d...)
	case []float32:
		out := make([]float64, len(d))
		for i, v := range d {
			out[i] = float64(v)
		}
		return out
	case float64:
		return []float64{d}
	case float32:
		return []float64{float64(d)}
	}
	return nil
}

func (p *program) scalarValue(n *G.Node) float64 {
	v := p.values(n)
	if len(v) == 0 {
		return math.NaN()
	}
	return v[0]
}

// setScalar sets a scalar input node to v.
func setScalar(n *G.Node, v float64) error {
	if n.Dtype() == tensor.Float32 {
		return G.Let(n, float32(v))
	}
	return G.Let(n, v)
}
