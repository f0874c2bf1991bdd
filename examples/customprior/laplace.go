package main

import (
	"fmt"
	"math"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// Laplace is a prior written outside the SDK: independent Laplace
// distributions, one per latent dimension, each centred at zero with its own
// learnable scale b_d = exp(logScale_d),
//
//	log p(z) = sum_d [ -|z_d| / b_d - log(2 b_d) ].
//
// Its heavier tails than the standard normal's let a few records sit far
// out in latent space without a large KL cost. It implements priors.Prior
// and nothing else: it has no closed-form KL against a Gaussian posterior,
// so the trainer uses the Monte Carlo estimate.
type Laplace struct {
	dim      int
	logScale *layers.Param // (1, D)
}

// NewLaplace returns a Laplace prior of dim dimensions whose scales start at
// 1/sqrt(2), which gives each dimension unit variance (the variance of a
// Laplace distribution is 2 b^2).
func NewLaplace(name string, dim int, dtype tensor.Dtype) (*Laplace, error) {
	if dim < 1 {
		return nil, fmt.Errorf("NewLaplace: dim: %d, want >= 1: %w", dim, layers.ErrInvalidArgument)
	}
	t := tensor.New(tensor.WithShape(1, dim), tensor.Of(dtype))
	start := -0.5 * math.Log(2)
	var err error
	if dtype == tensor.Float32 {
		err = t.Memset(float32(start))
	} else {
		err = t.Memset(start)
	}
	if err != nil {
		return nil, fmt.Errorf("NewLaplace: dtype: %w", err)
	}
	return &Laplace{dim: dim, logScale: &layers.Param{Name: name + ".log_scale", Value: t}}, nil
}

// Dim returns the latent size.
func (l *Laplace) Dim() int { return l.dim }

// Params returns the log-scales.
func (l *Laplace) Params() []*layers.Param { return []*layers.Param{l.logScale} }

// Scales returns the current scales b_d.
func (l *Laplace) Scales() []float64 {
	out := make([]float64, l.dim)
	for i := range out {
		switch d := l.logScale.Value.Data().(type) {
		case []float32:
			out[i] = math.Exp(float64(d[i]))
		case []float64:
			out[i] = math.Exp(d[i])
		}
	}
	return out
}

// LogProb returns log p(z) per row of z (N, D).
func (l *Laplace) LogProb(s *layers.Scope, z *G.Node) (*G.Node, error) {
	if z == nil || z.Shape().Dims() != 2 || z.Shape()[1] != l.dim {
		return nil, fmt.Errorf("Laplace.LogProb: z: want shape (N, %d): %w", l.dim, layers.ErrInvalidArgument)
	}
	ls := s.Bind(l.logScale)
	abs, err := G.Abs(z)
	if err != nil {
		return nil, err
	}
	negLS, err := G.Neg(ls)
	if err != nil {
		return nil, err
	}
	inv, err := G.Exp(negLS)
	if err != nil {
		return nil, err
	}
	scaled, err := G.BroadcastHadamardProd(abs, inv, nil, []byte{0})
	if err != nil {
		return nil, err
	}
	withLog, err := G.BroadcastAdd(scaled, ls, nil, []byte{0})
	if err != nil {
		return nil, err
	}
	sum, err := G.Sum(withLog, 1)
	if err != nil {
		return nil, err
	}
	negSum, err := G.Neg(sum)
	if err != nil {
		return nil, err
	}
	var c *G.Node
	if z.Dtype() == tensor.Float32 {
		c = G.NewConstant(float32(float64(l.dim) * math.Ln2))
	} else {
		c = G.NewConstant(float64(l.dim) * math.Ln2)
	}
	return G.Sub(negSum, c)
}

// Sample draws n rows by inverting the Laplace CDF: for u uniform on
// (-1/2, 1/2), z = -b sign(u) log(1 - 2|u|).
func (l *Laplace) Sample(rng *rand.Rand, n int) (*tensor.Dense, error) {
	if rng == nil || n < 1 {
		return nil, fmt.Errorf("Laplace.Sample: need an rng and n >= 1: %w", layers.ErrInvalidArgument)
	}
	b := l.Scales()
	v := make([]float64, n*l.dim)
	for i := range v {
		u := rng.Float64() - 0.5
		v[i] = -b[i%l.dim] * math.Copysign(1, u) * math.Log(1-2*math.Abs(u))
	}
	if l.logScale.Value.Dtype() == tensor.Float32 {
		f := make([]float32, len(v))
		for i, x := range v {
			f[i] = float32(x)
		}
		return tensor.New(tensor.WithShape(n, l.dim), tensor.WithBacking(f)), nil
	}
	return tensor.New(tensor.WithShape(n, l.dim), tensor.WithBacking(v)), nil
}
