package priors

import (
	"fmt"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// Kinds of the built-in priors, as written in Spec.Kind.
const (
	KindStandardNormal = "standard_normal"
	KindDiagonal       = "diagonal"
	KindMixture        = "mixture"
	KindVamp           = "vamp"
)

// Spec describes a built-in prior so that a checkpoint can rebuild it: the
// kind, the parameter-name prefix and the sizes. It holds no numbers; the
// parameter values are read from the checkpoint afterwards, by name.
type Spec struct {
	Kind string `json:"kind"`
	// Name is the prefix of the parameter names (empty for StandardNormal).
	Name string `json:"name,omitempty"`
	// Dim is the latent size D.
	Dim int `json:"dim"`
	// Components is K for Mixture and Vamp.
	Components int `json:"components,omitempty"`
	// InputShape is the per-record encoder input shape of a Vamp.
	InputShape []int `json:"input_shape,omitempty"`
}

// Describe returns the Spec of a built-in prior, and false for any other
// Prior (a user's own, or nil).
func Describe(p Prior) (Spec, bool) {
	switch p := p.(type) {
	case *StandardNormal:
		if p == nil {
			return Spec{}, false
		}
		return Spec{Kind: KindStandardNormal, Dim: p.dim}, true
	case *Diagonal:
		if p == nil {
			return Spec{}, false
		}
		return Spec{Kind: KindDiagonal, Name: p.name, Dim: p.dim}, true
	case *Mixture:
		if p == nil {
			return Spec{}, false
		}
		return Spec{Kind: KindMixture, Name: p.name, Dim: p.dim, Components: p.k}, true
	case *Vamp:
		if p == nil {
			return Spec{}, false
		}
		return Spec{Kind: KindVamp, Name: p.name, Dim: p.dim, Components: p.k, InputShape: p.InputShape()}, true
	}
	return Spec{}, false
}

// FromSpec builds the prior a Spec describes, with the same parameter names
// and shapes, in dtype. The values are initial ones (zeros, or the seed-0
// initialisation) until the checkpoint's tensors are copied in. encoder and
// head are used only by KindVamp (the model's own, already rebuilt) and may
// be nil otherwise. An unknown kind gives an error wrapping ErrUnknownKind.
func FromSpec(spec Spec, dtype tensor.Dtype, encoder layers.Layer, head *layers.GaussianHead) (Prior, error) {
	const where = "priors.FromSpec"
	var (
		p   Prior
		err error
	)
	// Each case assigns through a typed variable so that a failed
	// constructor yields a nil interface, not a typed nil.
	switch spec.Kind {
	case KindStandardNormal:
		var q *StandardNormal
		if q, err = NewStandardNormal(spec.Dim, dtype); err == nil {
			p = q
		}
	case KindDiagonal:
		var q *Diagonal
		if q, err = NewDiagonal(spec.Name, spec.Dim, dtype); err == nil {
			p = q
		}
	case KindMixture:
		var q *Mixture
		if q, err = NewMixture(spec.Name, spec.Components, spec.Dim, MixtureOptions{Dtype: dtype}); err == nil {
			p = q
		}
	case KindVamp:
		if head != nil && head.Latent() != spec.Dim {
			return nil, argError(where, "head", "latent size %d, spec says %d", head.Latent(), spec.Dim)
		}
		var q *Vamp
		if q, err = NewVamp(spec.Name, spec.Components, spec.InputShape, encoder, head, VampOptions{Dtype: dtype}); err == nil {
			p = q
		}
	default:
		return nil, fmt.Errorf("%s: kind %q: %w", where, spec.Kind, ErrUnknownKind)
	}
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return p, nil
}
