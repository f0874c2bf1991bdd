package layers

import (
	"fmt"

	G "gorgonia.org/gorgonia"
)

// Bounds of the log-variance that GaussianHead emits. exp(LogVarMax) is
// about 4.9e8 and exp(-LogVarMin) about 1.1e13: both, their square roots
// and their reciprocals are finite and normal in float32, so sigma, 1/sigma^2
// and the KL term stay finite, and a runaway pre-activation cannot turn
// exp(logVar) into +Inf or 0.
const (
	LogVarMin = -30.0
	LogVarMax = 20.0
)

// GaussianHead maps features h of shape (N, in) to the mean and the
// log-variance of a diagonal Gaussian over a latent space of size Latent:
// two Dense maps named name+".mean" and name+".logvar" (so the parameters
// are name.mean.weight, name.mean.bias, name.logvar.weight,
// name.logvar.bias).
//
// The log-variance is bounded smoothly to (LogVarMin, LogVarMax) by
// SoftClamp:
//
//	logVar = r + softplus(lo - r) - softplus(r - hi)
//
// where r is the raw Dense output. For r in [-18, 8], the range a working
// encoder lives in, this differs from r by less than 1e-5 and its gradient
// 1 - sigmoid(lo-r) - sigmoid(r-hi) differs from 1 by less than 1e-5, so it
// does not bias learning; outside it bends smoothly to the bounds. Unlike a
// hard clamp, whose gradient drops to zero at the bound, its slope decays
// gradually (exp(-distance) beyond a bound), so a unit pushed slightly out
// of range still gets a gradient that can bring it back.
type GaussianHead struct {
	name   string
	in     int
	latent int
	mean   *Dense
	logVar *Dense
}

// NewGaussianHead returns a GaussianHead. in and latent must be >= 1. Both
// maps are linear, so InitAuto means GlorotUniform.
func NewGaussianHead(name string, in, latent int, opt Options) (*GaussianHead, error) {
	const where = "layers.NewGaussianHead"
	if name == "" {
		return nil, argError(where, "name", "empty")
	}
	if in < 1 {
		return nil, argError(where, "in", "%d for head %q, want >= 1", in, name)
	}
	if latent < 1 {
		return nil, argError(where, "latent", "%d for head %q, want >= 1", latent, name)
	}
	mean, err := newDense(where, name+".mean", in, latent, opt, Identity)
	if err != nil {
		return nil, err
	}
	logVar, err := newDense(where, name+".logvar", in, latent, opt, Identity)
	if err != nil {
		return nil, err
	}
	return &GaussianHead{name: name, in: in, latent: latent, mean: mean, logVar: logVar}, nil
}

// Name returns the head's name.
func (h *GaussianHead) Name() string { return h.name }

// In returns the input width.
func (h *GaussianHead) In() int { return h.in }

// Latent returns the latent size D.
func (h *GaussianHead) Latent() int { return h.latent }

// Params returns name.mean.weight, name.mean.bias, name.logvar.weight,
// name.logvar.bias, in that order.
func (h *GaussianHead) Params() []*Param {
	return append(h.mean.Params(), h.logVar.Params()...)
}

// Forward returns mu and the bounded logVar, each of shape (N, Latent), for
// features x of shape (N, In).
func (h *GaussianHead) Forward(s *Scope, x *G.Node) (mu, logVar *G.Node, err error) {
	where := "layers.GaussianHead(" + h.name + ").Forward"
	if mu, err = h.mean.Forward(s, x); err != nil {
		return nil, nil, fmt.Errorf("%s: %w", where, err)
	}
	raw, err := h.logVar.Forward(s, x)
	if err != nil {
		return nil, nil, fmt.Errorf("%s: %w", where, err)
	}
	if logVar, err = SoftClamp(raw, LogVarMin, LogVarMax); err != nil {
		return nil, nil, fmt.Errorf("%s: %w", where, err)
	}
	return mu, logVar, nil
}

// SoftClamp returns x + softplus(lo - x) - softplus(x - hi), which equals
// lo + softplus(x - lo) - softplus(x - hi): a smooth, strictly increasing
// map of x into (lo, hi) that differs from x by about exp(-(x-lo)) +
// exp(x-hi) well inside the interval. The first form is used because its
// two correction terms are tiny there, so nothing cancels in float32. lo
// must be below hi.
func SoftClamp(x *G.Node, lo, hi float64) (*G.Node, error) {
	const where = "layers.SoftClamp"
	if x == nil {
		return nil, argError(where, "x", "nil node")
	}
	if !(lo < hi) {
		return nil, argError(where, "lo", "%v is not below hi %v", lo, hi)
	}
	if err := checkInputAnyFloat(where, &Scope{g: x.Graph()}, x); err != nil {
		return nil, err
	}
	below, err := G.Sub(constLike(x, lo), x)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	above, err := G.Sub(x, constLike(x, hi))
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	if below, err = softplus(below); err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	if above, err = softplus(above); err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	y, err := G.Add(x, below)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	if y, err = G.Sub(y, above); err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return y, nil
}

// Spec describes the head (kind "gaussian_head"); rebuild it with
// NewGaussianHeadFromSpec.
func (h *GaussianHead) Spec() Spec {
	return makeSpec(kindGaussianHead, headConfig{Name: h.name, In: h.in, Latent: h.latent})
}

type headConfig struct {
	Name   string `json:"name"`
	In     int    `json:"in"`
	Latent int    `json:"latent"`
}
