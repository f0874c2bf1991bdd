package priors

import (
	"fmt"
	"math"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// DefaultSpread is the standard deviation of the initial component means
// of a Mixture when MixtureOptions.Spread is zero.
const DefaultSpread = 0.5

// MixtureOptions configures NewMixture. The zero value is usable.
type MixtureOptions struct {
	// Dtype is float32 (the zero value) or float64.
	Dtype tensor.Dtype
	// Seed seeds the initial component means (PCG from math/rand/v2).
	Seed uint64
	// Spread is the standard deviation of the initial means; zero means
	// DefaultSpread. Negative is an error.
	Spread float64
}

// Mixture is a learnable mixture of K diagonal Gaussians:
//
//	p(z) = sum_k w_k N(z; mu_k, diag(exp(v_k)))
//
// with w = softmax(name.logits) (shape (1, K), initialised to zero, so the
// weights start equal), means name.means (K, D) and log-variances
// name.logvars (K, D, initialised to zero). The means start as independent
// N(0, Spread^2) draws from the seed so the components differ from the
// first step. There is no closed-form KL to a mixture; the trainer uses
// the Monte Carlo estimate described in the package documentation.
type Mixture struct {
	name    string
	k, dim  int
	dtype   tensor.Dtype
	logits  *layers.Param
	means   *layers.Param
	logVars *layers.Param
}

// NewMixture returns a mixture of components diagonal Gaussians of width dim.
func NewMixture(name string, components, dim int, opt MixtureOptions) (*Mixture, error) {
	const where = "priors.NewMixture"
	if name == "" {
		return nil, argError(where, "name", "empty")
	}
	if components < 1 {
		return nil, argError(where, "components", "want >= 1, have %d", components)
	}
	if dim < 1 {
		return nil, argError(where, "dim", "want >= 1, have %d", dim)
	}
	dt, err := checkDtype(where, opt.Dtype)
	if err != nil {
		return nil, err
	}
	spread := opt.Spread
	if spread < 0 || math.IsNaN(spread) || math.IsInf(spread, 0) {
		return nil, argError(where, "opt.Spread", "want finite >= 0, have %v", spread)
	}
	if spread == 0 {
		spread = DefaultSpread
	}
	rng := rand.New(rand.NewPCG(opt.Seed, 0x6d69787475726521))
	means := make([]float64, components*dim)
	for i := range means {
		means[i] = spread * rng.NormFloat64()
	}
	return &Mixture{
		name:    name,
		k:       components,
		dim:     dim,
		dtype:   dt,
		logits:  newParam(name+".logits", dt, nil, 1, components),
		means:   newParam(name+".means", dt, means, components, dim),
		logVars: newParam(name+".logvars", dt, nil, components, dim),
	}, nil
}

// Dim returns the latent size D.
func (p *Mixture) Dim() int { return p.dim }

// Components returns K.
func (p *Mixture) Components() int { return p.k }

// Name returns the prefix of the parameter names.
func (p *Mixture) Name() string { return p.name }

// Dtype returns the prior's element type.
func (p *Mixture) Dtype() tensor.Dtype { return p.dtype }

// Params returns name.logits, name.means and name.logvars, in that order.
func (p *Mixture) Params() []*layers.Param {
	return []*layers.Param{p.logits, p.means, p.logVars}
}

// Weights returns the current mixture weights softmax(logits), computed
// stably in float64.
func (p *Mixture) Weights() ([]float64, error) {
	l, err := values(p.logits.Value)
	if err != nil {
		return nil, fmt.Errorf("priors.Mixture.Weights: %w", err)
	}
	if len(l) != p.k {
		return nil, argError("priors.Mixture.Weights", "logits", "have %d values, want %d", len(l), p.k)
	}
	lw := logSoftmax(l)
	for i, v := range lw {
		lw[i] = math.Exp(v)
	}
	return lw, nil
}

// LogProb returns log p(z) for every row of z (N, D): a vector of N. See
// mixtureLogProb for how it is computed.
func (p *Mixture) LogProb(s *layers.Scope, z *G.Node) (*G.Node, error) {
	const where = "priors.Mixture.LogProb"
	if err := checkZ(where, s, z, p.dim, p.dtype); err != nil {
		return nil, err
	}
	logits := s.Bind(p.logits)
	// Stable log-softmax: logits - logsumexp(logits).
	lse, err := losses.LogSumExp(logits, 1)
	if err != nil {
		return nil, fmt.Errorf("%s: log-softmax: %w", where, err)
	}
	if lse, err = G.Reshape(lse, tensor.Shape{1, 1}); err != nil {
		return nil, fmt.Errorf("%s: log-softmax: %w", where, err)
	}
	logW, err := G.BroadcastSub(logits, lse, nil, []byte{1})
	if err != nil {
		return nil, fmt.Errorf("%s: log-softmax: %w", where, err)
	}
	out, err := mixtureLogProb(z, logW, s.Bind(p.means), s.Bind(p.logVars))
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return out, nil
}

// Sample draws n rows: for each row one uniform from rng picks the
// component by its weight, then D standard normals give the draw.
func (p *Mixture) Sample(rng *rand.Rand, n int) (*tensor.Dense, error) {
	const where = "priors.Mixture.Sample"
	if err := checkSample(where, rng, n); err != nil {
		return nil, err
	}
	w, err := p.Weights()
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	mu, err := values(p.means.Value)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	lv, err := values(p.logVars.Value)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	if len(mu) != p.k*p.dim || len(lv) != p.k*p.dim {
		return nil, argError(where, "params", "means has %d values, logvars %d, want %d", len(mu), len(lv), p.k*p.dim)
	}
	return sampleMixture(rng, n, p.dim, w, mu, lv, p.dtype), nil
}

// mixtureLogProb adds log sum_k exp(logW_k + log N(z; mu_k, diag(exp(lv_k))))
// for every row of z to the graph: z is (N, D), mu and lv are (K, D), logW
// is (1, K) or, when nil, the uniform weights 1/K.
//
// All N*K component log-densities are formed at once from matrix products,
// without a three-dimensional broadcast, using
//
//	sum_d (z_d - mu_kd)^2 / s_kd
//	  = (z∘z) @ (1/s)^T - 2 z @ (mu/s)^T + rowsum(mu^2/s)^T
//
// where s = exp(lv). Each term is (N, K); the last is one row repeated. A
// stable log-sum-exp along axis 1 then gives the N log-densities. The
// expansion subtracts large numbers when |z| and |mu| are large next to
// the component scales; in float32 keep latents of moderate size.
func mixtureLogProb(z, logW, mu, lv *G.Node) (*G.Node, error) {
	k, d := mu.Shape()[0], mu.Shape()[1]
	negLV, err := G.Neg(lv)
	if err != nil {
		return nil, err
	}
	inv, err := G.Exp(negLV) // 1/s, (K, D)
	if err != nil {
		return nil, err
	}
	zz, err := G.HadamardProd(z, z)
	if err != nil {
		return nil, err
	}
	invT, err := G.Transpose(inv)
	if err != nil {
		return nil, err
	}
	quad, err := G.Mul(zz, invT) // (N, K)
	if err != nil {
		return nil, err
	}
	muInv, err := G.HadamardProd(mu, inv) // mu/s, (K, D)
	if err != nil {
		return nil, err
	}
	muInvT, err := G.Transpose(muInv)
	if err != nil {
		return nil, err
	}
	cross, err := G.Mul(z, muInvT) // (N, K)
	if err != nil {
		return nil, err
	}
	// -0.5 * (quad - 2 cross) = cross - 0.5 quad.
	halfQuad, err := G.Mul(quad, scalar(z, 0.5))
	if err != nil {
		return nil, err
	}
	body, err := G.Sub(cross, halfQuad)
	if err != nil {
		return nil, err
	}
	// Per-component row: logW - 0.5 (rowsum(mu^2/s) + rowsum(lv) + D log 2pi).
	mu2s, err := G.HadamardProd(mu, muInv)
	if err != nil {
		return nil, err
	}
	perK, err := G.Add(mu2s, lv) // (K, D)
	if err != nil {
		return nil, err
	}
	rowSum, err := G.Sum(perK, 1) // (K)
	if err != nil {
		return nil, err
	}
	row, err := G.Reshape(rowSum, tensor.Shape{1, k})
	if err != nil {
		return nil, err
	}
	if row, err = G.Mul(row, scalar(z, -0.5)); err != nil {
		return nil, err
	}
	c := -0.5 * float64(d) * log2Pi
	if logW == nil {
		c -= math.Log(float64(k))
	} else if row, err = G.Add(row, logW); err != nil {
		return nil, err
	}
	if row, err = G.Add(row, scalar(z, c)); err != nil {
		return nil, err
	}
	logits, err := G.BroadcastAdd(body, row, nil, []byte{0}) // (N, K)
	if err != nil {
		return nil, err
	}
	out, err := losses.LogSumExp(logits, 1)
	if err != nil {
		return nil, err
	}
	if n := z.Shape()[0]; !out.Shape().Eq(tensor.Shape{n}) {
		return G.Reshape(out, tensor.Shape{n})
	}
	return out, nil
}
