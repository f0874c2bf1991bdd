package layers

import (
	"fmt"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// Reparameterize returns z = mu + exp(logVar/2) * eps, the reparameterised
// sample of a diagonal Gaussian (Kingma and Welling 2014, section 2.4).
// Gradients flow to mu and logVar; eps is an input the caller fills with
// standard normal noise (see FillNormal) before each run, which is what
// makes every run repeatable from a seed.
//
// mu and logVar have shape (N, D). eps has shape (K*N, D) for K samples per
// input; the result has the same shape, and sample k of record n is row
// k*N + n. K = 1 is the usual training case; K > 1 feeds the
// importance-weighted bound.
func Reparameterize(mu, logVar, eps *G.Node) (*G.Node, error) {
	const where = "layers.Reparameterize"
	if mu == nil || logVar == nil || eps == nil {
		return nil, argError(where, "mu, logVar, eps", "nil node")
	}
	ms, ls, es := mu.Shape(), logVar.Shape(), eps.Shape()
	if ms.Dims() != 2 {
		return nil, argError(where, "mu", "want shape (N, D), have %v", ms)
	}
	if !ms.Eq(ls) {
		return nil, argError(where, "logVar", "shape %v differs from mu's %v", ls, ms)
	}
	n, d := ms[0], ms[1]
	if n < 1 || d < 1 {
		return nil, argError(where, "mu", "empty shape %v", ms)
	}
	if es.Dims() != 2 || es[1] != d || es[0]%n != 0 || es[0] < n {
		return nil, argError(where, "eps", "want shape (K*%d, %d) with K >= 1, have %v", n, d, es)
	}
	if mu.Dtype() != logVar.Dtype() || mu.Dtype() != eps.Dtype() {
		return nil, argError(where, "eps", "dtypes differ: mu %v, logVar %v, eps %v", mu.Dtype(), logVar.Dtype(), eps.Dtype())
	}
	k := es[0] / n
	half := constLike(mu, 0.5)
	halfLogVar, err := G.Mul(logVar, half)
	if err != nil {
		return nil, fmt.Errorf("%s: sigma: %w", where, err)
	}
	sigma, err := G.Exp(halfLogVar)
	if err != nil {
		return nil, fmt.Errorf("%s: sigma: %w", where, err)
	}
	if k == 1 {
		scaled, err := G.HadamardProd(sigma, eps)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", where, err)
		}
		return G.Add(mu, scaled)
	}
	// Broadcast over the K samples: view mu and sigma as one row of N*D
	// values and eps as K rows of N*D, then fold back to (K*N, D). reshape
	// (not G.Reshape) copies leaf nodes first: a G.Reshape view of the eps
	// input would otherwise be overwritten in place by the backward pass.
	muRow, err := reshape(mu, tensor.Shape{1, n * d})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	sigmaRow, err := reshape(sigma, tensor.Shape{1, n * d})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	epsRows, err := reshape(eps, tensor.Shape{k, n * d})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	scaled, err := G.BroadcastHadamardProd(sigmaRow, epsRows, []byte{0}, nil)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	z, err := G.BroadcastAdd(muRow, scaled, []byte{0}, nil)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return G.Reshape(z, tensor.Shape{k * n, d})
}

// FillNormal fills t (float32 or float64) with independent standard normal
// draws from rng. With the same rng state it writes the same numbers.
func FillNormal(rng *rand.Rand, t *tensor.Dense) error {
	if rng == nil {
		return argError("layers.FillNormal", "rng", "nil")
	}
	// Float64s and Float32s, not Data: Data boxes the slice, an allocation
	// per call, and the trainer fills noise at every step.
	switch t.Dtype() {
	case tensor.Float64:
		data := t.Float64s()
		for i := range data {
			data[i] = rng.NormFloat64()
		}
	case tensor.Float32:
		data := t.Float32s()
		for i := range data {
			data[i] = float32(rng.NormFloat64())
		}
	default:
		return argError("layers.FillNormal", "t", "dtype %v is not float32 or float64", t.Dtype())
	}
	return nil
}

// constLike returns a scalar constant of v in the dtype of n.
func constLike(n *G.Node, v float64) *G.Node {
	if n.Dtype() == tensor.Float32 {
		return G.NewConstant(float32(v))
	}
	return G.NewConstant(v)
}
