package priors

import (
	"fmt"
	"math"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// VampOptions configures NewVamp. The zero value is usable.
type VampOptions struct {
	// Dtype is float32 or float64. The zero value takes the dtype of the
	// head's parameters (float32 when the head has none).
	Dtype tensor.Dtype
	// Seed seeds the initial pseudo-inputs (PCG from math/rand/v2).
	Seed uint64
	// Data, when set, holds M >= K training records, shape (M, F) or
	// (M, input shape...); the pseudo-inputs start as K distinct rows of
	// it chosen with the seed. When nil they start as independent uniform
	// draws in [0, 1), which suits inputs scaled to that range (pixels).
	Data *tensor.Dense
}

// Vamp is the VampPrior (Tomczak and Welling 2018, "VAE with a VampPrior"):
// the mixture of the model's own posteriors at K learnable pseudo-inputs
// u_k,
//
//	p(z) = (1/K) sum_k q(z | u_k)
//
// where q(z | u) = N(mu(u), diag(exp(logVar(u)))) is the encoder followed
// by the Gaussian head. Its one parameter is name.pseudo_inputs, shape
// (K, F) with F the flattened width of one encoder input; for an encoder
// that takes (N, C, H, W) batches, give the input shape {C, H, W} and the
// pseudo-inputs are reshaped inside the graph.
//
// The encoder and head are the model's and are NOT owned by the prior:
// Params returns only the pseudo-inputs, and the encoder's parameters are
// listed (and saved) by the model. Bound through the same Scope as the
// model, the prior's log-density shares the encoder's weights and passes
// gradients to them as well as to the pseudo-inputs.
type Vamp struct {
	name       string
	k, f, dim  int
	inputShape []int
	dtype      tensor.Dtype
	encoder    layers.Layer
	head       *layers.GaussianHead
	pseudo     *layers.Param
}

// NewVamp returns a VampPrior with components pseudo-inputs, each of the
// given per-record input shape ({F} for a dense encoder, {C, H, W} for a
// convolutional one), passed through encoder and head.
func NewVamp(name string, components int, inputShape []int, encoder layers.Layer, head *layers.GaussianHead, opt VampOptions) (*Vamp, error) {
	const where = "priors.NewVamp"
	if name == "" {
		return nil, argError(where, "name", "empty")
	}
	if components < 1 {
		return nil, argError(where, "components", "want >= 1, have %d", components)
	}
	if len(inputShape) == 0 {
		return nil, argError(where, "inputShape", "empty")
	}
	f := 1
	for _, s := range inputShape {
		if s < 1 {
			return nil, argError(where, "inputShape", "size %d in %v", s, inputShape)
		}
		f *= s
	}
	if encoder == nil {
		return nil, argError(where, "encoder", "nil")
	}
	if head == nil {
		return nil, argError(where, "head", "nil")
	}
	dim := head.Latent()
	if dim < 1 {
		return nil, argError(where, "head", "latent size %d", dim)
	}
	dtype := opt.Dtype
	if dtype.Type == nil {
		if hp := head.Params(); len(hp) > 0 && hp[0] != nil && hp[0].Value != nil {
			dtype = hp[0].Value.Dtype()
		}
	}
	dt, err := checkDtype(where, dtype)
	if err != nil {
		return nil, err
	}
	rng := rand.New(rand.NewPCG(opt.Seed, 0x76616d7070726921))
	init := make([]float64, components*f)
	if opt.Data != nil {
		sh := opt.Data.Shape()
		if sh.Dims() < 1 || sh[0] < components || sh.TotalSize()/max(sh[0], 1) != f {
			return nil, argError(where, "opt.Data", "want at least %d records of %d values, have shape %v", components, f, sh)
		}
		data, err := values(opt.Data)
		if err != nil {
			return nil, fmt.Errorf("%s: opt.Data: %w", where, err)
		}
		for k, row := range rng.Perm(sh[0])[:components] {
			copy(init[k*f:(k+1)*f], data[row*f:(row+1)*f])
		}
	} else {
		for i := range init {
			init[i] = rng.Float64()
		}
	}
	return &Vamp{
		name:       name,
		k:          components,
		f:          f,
		dim:        dim,
		inputShape: append([]int(nil), inputShape...),
		dtype:      dt,
		encoder:    encoder,
		head:       head,
		pseudo:     newParam(name+".pseudo_inputs", dt, init, components, f),
	}, nil
}

// Dim returns the latent size D (the head's).
func (p *Vamp) Dim() int { return p.dim }

// Components returns K, the number of pseudo-inputs.
func (p *Vamp) Components() int { return p.k }

// InputShape returns the per-record input shape given at construction.
func (p *Vamp) InputShape() []int { return append([]int(nil), p.inputShape...) }

// Name returns the prefix of the parameter name.
func (p *Vamp) Name() string { return p.name }

// Dtype returns the prior's element type.
func (p *Vamp) Dtype() tensor.Dtype { return p.dtype }

// Params returns only name.pseudo_inputs; the encoder and head parameters
// belong to the model.
func (p *Vamp) Params() []*layers.Param { return []*layers.Param{p.pseudo} }

// components adds the encoder and head applied to the pseudo-inputs to the
// scope's graph and returns mu and logVar of shape (K, D).
func (p *Vamp) components(where string, s *layers.Scope) (mu, logVar *G.Node, err error) {
	u := s.Bind(p.pseudo)
	if len(p.inputShape) > 1 {
		// Through layers.Reshape, not G.Reshape: a reshape of the bound
		// parameter itself would share its memory, and an in-place op of the
		// encoder (an ELU first, say) would then write into the
		// pseudo-inputs. layers.Reshape gives the reshaped batch memory of
		// its own.
		r, err := layers.NewReshape(p.name+".pseudo_inputs.reshape", p.inputShape...)
		if err != nil {
			return nil, nil, fmt.Errorf("%s: pseudo-inputs: %w", where, err)
		}
		if u, err = r.Forward(s, u); err != nil {
			return nil, nil, fmt.Errorf("%s: pseudo-inputs: %w", where, err)
		}
	}
	h, err := p.encoder.Forward(s, u)
	if err != nil {
		return nil, nil, fmt.Errorf("%s: encoder: %w", where, err)
	}
	if mu, logVar, err = p.head.Forward(s, h); err != nil {
		return nil, nil, fmt.Errorf("%s: head: %w", where, err)
	}
	want := tensor.Shape{p.k, p.dim}
	if !mu.Shape().Eq(want) || !logVar.Shape().Eq(want) {
		return nil, nil, argError(where, "head", "gives shapes %v and %v, want %v", mu.Shape(), logVar.Shape(), want)
	}
	return mu, logVar, nil
}

// LogProb returns log p(z) for every row of z (N, D), computed as for
// Mixture with equal weights and the components q(z | u_k).
func (p *Vamp) LogProb(s *layers.Scope, z *G.Node) (*G.Node, error) {
	const where = "priors.Vamp.LogProb"
	if err := checkZ(where, s, z, p.dim, p.dtype); err != nil {
		return nil, err
	}
	mu, lv, err := p.components(where, s)
	if err != nil {
		return nil, err
	}
	out, err := mixtureLogProb(z, nil, mu, lv)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return out, nil
}

// Posteriors runs the encoder and head on the current pseudo-inputs in a
// small graph of its own and returns the component means and
// log-variances, each (K, D) in the prior's dtype.
//
// Compiling that graph writes bookkeeping into the encoder's parameter
// tensors (a gorgonia detail), so do not call Posteriors or Sample while
// other goroutines run graphs over the same encoder; vae.Model.SamplePrior
// takes care of that for a model's prior.
func (p *Vamp) Posteriors() (mu, logVar *tensor.Dense, err error) {
	const where = "priors.Vamp.Posteriors"
	g := G.NewGraph()
	s := layers.NewScope(g)
	muN, lvN, err := p.components(where, s)
	if err != nil {
		return nil, nil, err
	}
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		return nil, nil, fmt.Errorf("%s: %w", where, err)
	}
	mt, ok1 := muN.Value().(*tensor.Dense)
	lt, ok2 := lvN.Value().(*tensor.Dense)
	if !ok1 || !ok2 {
		return nil, nil, fmt.Errorf("%s: head output is not a dense tensor", where)
	}
	return mt.Clone().(*tensor.Dense), lt.Clone().(*tensor.Dense), nil
}

// Sample draws n rows: it computes the K posteriors once (see Posteriors),
// then for each row one uniform from rng picks a pseudo-input and D
// standard normals give the draw.
func (p *Vamp) Sample(rng *rand.Rand, n int) (*tensor.Dense, error) {
	const where = "priors.Vamp.Sample"
	if err := checkSample(where, rng, n); err != nil {
		return nil, err
	}
	muT, lvT, err := p.Posteriors()
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	mu, err := values(muT)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	lv, err := values(lvT)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	w := make([]float64, p.k)
	for i := range w {
		w[i] = 1 / float64(p.k)
	}
	for _, v := range lv {
		if math.IsNaN(v) {
			return nil, fmt.Errorf("%s: encoder gives NaN log-variance", where)
		}
	}
	return sampleMixture(rng, n, p.dim, w, mu, lv, p.dtype), nil
}
