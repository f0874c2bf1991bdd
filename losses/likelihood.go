package losses

import (
	G "gorgonia.org/gorgonia"

	"lowerbound.dev/layers"
)

// Likelihood is the decoder's observation model p(x | z). The decoder emits
// one output per feature (logits for Bernoulli, means for Gaussian) and the
// likelihood turns it into log-densities. Implement it to bring your own.
type Likelihood interface {
	// LogProb returns log p(x | out) per record: a vector of N values for x
	// and out of shape (N, F). Learnable parameters are bound through s.
	LogProb(s *layers.Scope, x, out *G.Node) (*G.Node, error)
	// Mean maps decoder output to the expected value of x (the
	// reconstruction): the sigmoid of the logits, or the Gaussian mean.
	Mean(s *layers.Scope, out *G.Node) (*G.Node, error)
	// Params lists learnable parameters (a learned sigma), or none.
	Params() []*layers.Param
}
