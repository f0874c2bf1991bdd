package priors

import "lowerbound.dev/layers"

// Encoder returns the encoder the prior runs on its pseudo-inputs (the
// model's own, shared, not owned by the prior). Inference code that
// computes the prior's components without a graph uses it with Head and
// the pseudo-input parameter.
func (p *Vamp) Encoder() layers.Layer { return p.encoder }

// Head returns the Gaussian head the prior applies after its encoder.
func (p *Vamp) Head() *layers.GaussianHead { return p.head }

// PseudoInputs returns the (K, F) pseudo-input parameter (the one entry of
// Params).
func (p *Vamp) PseudoInputs() *layers.Param { return p.pseudo }
