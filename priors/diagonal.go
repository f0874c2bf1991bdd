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

// Diagonal is a learnable diagonal Gaussian prior p(z) = N(m, diag(exp(v)))
// with parameters name.mean (m) and name.logvar (v), both of shape (1, D)
// and initialised to zero, so it starts as N(0, I). It has a closed-form KL.
type Diagonal struct {
	name   string
	dim    int
	dtype  tensor.Dtype
	mean   *layers.Param
	logVar *layers.Param
}

// NewDiagonal returns a learnable diagonal Gaussian prior of width dim. The
// zero dtype means float32.
func NewDiagonal(name string, dim int, dtype tensor.Dtype) (*Diagonal, error) {
	const where = "priors.NewDiagonal"
	if name == "" {
		return nil, argError(where, "name", "empty")
	}
	if dim < 1 {
		return nil, argError(where, "dim", "want >= 1, have %d", dim)
	}
	dt, err := checkDtype(where, dtype)
	if err != nil {
		return nil, err
	}
	return &Diagonal{
		name:   name,
		dim:    dim,
		dtype:  dt,
		mean:   newParam(name+".mean", dt, nil, 1, dim),
		logVar: newParam(name+".logvar", dt, nil, 1, dim),
	}, nil
}

// Dim returns the latent size D.
func (p *Diagonal) Dim() int { return p.dim }

// Name returns the prefix of the parameter names.
func (p *Diagonal) Name() string { return p.name }

// Dtype returns the prior's element type.
func (p *Diagonal) Dtype() tensor.Dtype { return p.dtype }

// Params returns name.mean and name.logvar, in that order.
func (p *Diagonal) Params() []*layers.Param { return []*layers.Param{p.mean, p.logVar} }

// LogProb returns log N(z; m, diag(exp(v))) for every row of z (N, D).
func (p *Diagonal) LogProb(s *layers.Scope, z *G.Node) (*G.Node, error) {
	const where = "priors.Diagonal.LogProb"
	if err := checkZ(where, s, z, p.dim, p.dtype); err != nil {
		return nil, err
	}
	perDim, err := losses.DiagGaussianLogProb(z, s.Bind(p.mean), s.Bind(p.logVar))
	return sumDims(where, perDim, err)
}

// KL returns KL(N(mu, exp(logVar)) || N(m, exp(v))) per dimension, shape
// (N, D); gradients reach both q's and the prior's parameters.
func (p *Diagonal) KL(s *layers.Scope, mu, logVar *G.Node) (*G.Node, error) {
	const where = "priors.Diagonal.KL"
	if err := checkKL(where, s, mu, logVar, p.dim, p.dtype); err != nil {
		return nil, err
	}
	out, err := losses.KLDiagonal(mu, logVar, s.Bind(p.mean), s.Bind(p.logVar))
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return out, nil
}

// Sample draws n rows m + exp(v/2) * eps with the current parameter values,
// taking n*D standard normals from rng row by row.
func (p *Diagonal) Sample(rng *rand.Rand, n int) (*tensor.Dense, error) {
	const where = "priors.Diagonal.Sample"
	if err := checkSample(where, rng, n); err != nil {
		return nil, err
	}
	m, err := values(p.mean.Value)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	v, err := values(p.logVar.Value)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	if len(m) != p.dim || len(v) != p.dim {
		return nil, argError(where, "params", "mean has %d values, logvar %d, want %d", len(m), len(v), p.dim)
	}
	out := make([]float64, n*p.dim)
	for i := 0; i < n; i++ {
		for j := 0; j < p.dim; j++ {
			out[i*p.dim+j] = m[j] + math.Exp(0.5*v[j])*rng.NormFloat64()
		}
	}
	return denseOf(p.dtype, out, n, p.dim), nil
}
