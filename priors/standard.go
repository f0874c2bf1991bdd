package priors

import (
	"fmt"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// StandardNormal is the fixed prior p(z) = N(0, I) over D dimensions. It has
// no parameters and a closed-form KL divergence.
type StandardNormal struct {
	dim   int
	dtype tensor.Dtype
}

// NewStandardNormal returns the N(0, I) prior of width dim. The zero dtype
// means float32.
func NewStandardNormal(dim int, dtype tensor.Dtype) (*StandardNormal, error) {
	const where = "priors.NewStandardNormal"
	if dim < 1 {
		return nil, argError(where, "dim", "want >= 1, have %d", dim)
	}
	dt, err := checkDtype(where, dtype)
	if err != nil {
		return nil, err
	}
	return &StandardNormal{dim: dim, dtype: dt}, nil
}

// Dim returns the latent size D.
func (p *StandardNormal) Dim() int { return p.dim }

// Dtype returns the prior's element type.
func (p *StandardNormal) Dtype() tensor.Dtype { return p.dtype }

// Params returns nil: the standard normal has nothing to learn.
func (p *StandardNormal) Params() []*layers.Param { return nil }

// LogProb returns log N(z; 0, I) for every row of z (N, D): a vector of N.
func (p *StandardNormal) LogProb(s *layers.Scope, z *G.Node) (*G.Node, error) {
	const where = "priors.StandardNormal.LogProb"
	if err := checkZ(where, s, z, p.dim, p.dtype); err != nil {
		return nil, err
	}
	perDim, err := losses.StandardNormalLogProb(z)
	return sumDims(where, perDim, err)
}

// KL returns KL(N(mu, exp(logVar)) || N(0, I)) per dimension, shape (N, D)
// (Kingma and Welling 2014, appendix B).
func (p *StandardNormal) KL(s *layers.Scope, mu, logVar *G.Node) (*G.Node, error) {
	const where = "priors.StandardNormal.KL"
	if err := checkKL(where, s, mu, logVar, p.dim, p.dtype); err != nil {
		return nil, err
	}
	out, err := losses.KLStandardNormal(mu, logVar)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return out, nil
}

// Sample draws n rows from N(0, I): n*D standard normals from rng, row by
// row.
func (p *StandardNormal) Sample(rng *rand.Rand, n int) (*tensor.Dense, error) {
	const where = "priors.StandardNormal.Sample"
	if err := checkSample(where, rng, n); err != nil {
		return nil, err
	}
	out := make([]float64, n*p.dim)
	for i := range out {
		out[i] = rng.NormFloat64()
	}
	return denseOf(p.dtype, out, n, p.dim), nil
}
