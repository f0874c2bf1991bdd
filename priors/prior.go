package priors

import (
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// Prior is a distribution p(z) over the latent space. Implement it to bring
// your own prior; the trainer, evaluator and checkpoints use nothing else.
type Prior interface {
	// Dim is the latent size D.
	Dim() int
	// LogProb adds log p(z) for every row of z, shape (N, D), to z's graph
	// and returns a vector of N log-densities. Learnable parameters are bound
	// through s so the trainer can reach them.
	LogProb(s *layers.Scope, z *G.Node) (*G.Node, error)
	// Sample draws n latent vectors with rng and returns them as an (n, D)
	// tensor in the prior's dtype. The same rng state gives the same draws.
	Sample(rng *rand.Rand, n int) (*tensor.Dense, error)
	// Params lists the learnable parameters in a fixed order (none for a
	// fixed prior). Their names are checkpoint tensor names.
	Params() []*layers.Param
}

// ClosedFormKL is implemented by priors with an analytic KL divergence
// KL(q || p) from a diagonal Gaussian q = N(mu, exp(logVar)). It returns the
// divergence per latent dimension, shape (N, D). When a prior implements it,
// training uses it in place of the Monte Carlo estimate.
type ClosedFormKL interface {
	KL(s *layers.Scope, mu, logVar *G.Node) (*G.Node, error)
}
