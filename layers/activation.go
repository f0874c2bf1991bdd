package layers

import (
	"encoding/json"
	"fmt"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// Activation names an elementwise nonlinearity. It is also a Layer without
// parameters, so it can sit between other layers in a Sequential.
type Activation string

// The activations this package knows. Any other name is an error.
const (
	// ReLU is max(x, 0). Its derivative at 0 is taken as 1.
	ReLU Activation = "relu"
	// LeakyReLU is x for x >= 0 and LeakySlope*x below.
	LeakyReLU Activation = "leaky_relu"
	// Tanh is the hyperbolic tangent.
	Tanh Activation = "tanh"
	// Sigmoid is 1 / (1 + exp(-x)).
	Sigmoid Activation = "sigmoid"
	// Softplus is log(1 + exp(x)), computed as max(x, 0) + log1p(exp(-|x|))
	// so that it is exact and finite for every x.
	Softplus Activation = "softplus"
	// ELU is x for x >= 0 and ELUAlpha*(exp(x) - 1) below (Clevert,
	// Unterthiner and Hochreiter 2016).
	ELU Activation = "elu"
	// Identity returns its input.
	Identity Activation = "identity"
)

// LeakySlope is the slope of LeakyReLU for negative inputs.
const LeakySlope = 0.01

// ELUAlpha is the scale of ELU for negative inputs; with 1 the function has
// a continuous first derivative.
const ELUAlpha = 1.0

// Valid reports whether a is one of the known activations.
func (a Activation) Valid() bool {
	switch a {
	case ReLU, LeakyReLU, Tanh, Sigmoid, Softplus, ELU, Identity:
		return true
	}
	return false
}

// negativeSlope is the slope below zero used by the He initialisation.
func (a Activation) negativeSlope() float64 {
	if a == LeakyReLU {
		return LeakySlope
	}
	return 0
}

// orDefault returns a, or def when a is empty.
func (a Activation) orDefault(def Activation) Activation {
	if a == "" {
		return def
	}
	return a
}

// check returns an error naming where and arg when a is unknown.
func (a Activation) check(where, arg string) error {
	if !a.Valid() {
		return argError(where, arg, "unknown activation %q (want relu, leaky_relu, tanh, sigmoid, softplus, elu or identity)", string(a))
	}
	return nil
}

// ApplyFloat32 applies the activation to every value of y, in place, with
// the kernels of the fused Dense op (tanh, sigmoid and softplus within a
// few ulp of the float64 functions; see internal/vecmath). Code that runs a
// model outside the graphs (the vae package's lean inference path, a user
// layer joining it) calls this so that both paths compute the same numbers.
// Identity and unknown activations leave y as it is.
func (a Activation) ApplyFloat32(y []float32) { activate32(a, y) }

// ApplyFloat64 is ApplyFloat32 for float64 values.
func (a Activation) ApplyFloat64(y []float64) { activate64(a, y) }

// GradFloat32 sets d[i] = g[i] * act'(x[i]), the gradient through the
// activation, from its output y[i] = act(x[i]) alone; the fused Dense op's
// backward pass uses the same function (see dense_op.go for how each
// derivative is had from the output). d may be g. y and g must be at least
// as long as d. Identity and unknown activations copy g.
func (a Activation) GradFloat32(d, y, g []float32) { actGrad(a, d, y, g) }

// GradFloat64 is GradFloat32 for float64 values.
func (a Activation) GradFloat64(d, y, g []float64) { actGrad(a, d, y, g) }

// Apply adds the activation of x to x's graph. x must be float32 or float64.
func (a Activation) Apply(x *G.Node) (*G.Node, error) {
	where := "layers.Activation(" + string(a) + ").Apply"
	if err := a.check(where, "a"); err != nil {
		return nil, err
	}
	if x == nil {
		return nil, argError(where, "x", "nil node")
	}
	if dt := x.Dtype(); dt != tensor.Float32 && dt != tensor.Float64 {
		return nil, argError(where, "x", "dtype %v is not float32 or float64", dt)
	}
	var (
		y   *G.Node
		err error
	)
	switch a {
	case Identity:
		return x, nil
	case ReLU:
		y, err = G.Rectify(x)
	case LeakyReLU:
		y, err = G.LeakyRelu(x, LeakySlope)
	case Tanh:
		y, err = G.Tanh(x)
	case Sigmoid:
		y, err = G.Sigmoid(x)
	case Softplus:
		y, err = softplus(x)
	case ELU:
		y, err = elu(x)
	}
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return y, nil
}

// Forward applies the activation; it makes Activation a Layer.
func (a Activation) Forward(s *Scope, x *G.Node) (*G.Node, error) { return a.Apply(x) }

// Params returns nil: an activation has no parameters.
func (a Activation) Params() []*Param { return nil }

// Spec describes the activation (kind "activation").
func (a Activation) Spec() Spec {
	return makeSpec(kindActivation, activationConfig{Activation: a})
}

type activationConfig struct {
	Activation Activation `json:"activation"`
}

// positivePart returns x*[x >= 0] (the rectifier) and the mask [x >= 0]
// itself. Comparison nodes carry no gradient, so d/dx of the result is the
// mask.
func positivePart(x *G.Node) (pos, mask *G.Node, err error) {
	mask, err = G.Gte(x, constLike(x, 0), true)
	if err != nil {
		return nil, nil, err
	}
	pos, err = G.HadamardProd(x, mask)
	if err != nil {
		return nil, nil, err
	}
	return pos, mask, nil
}

// softplus computes max(x,0) + log1p(exp(-|x|)), written with one mask
// m = [x >= 0] as pos + softplus_g(x - 2*pos), pos = x*m. Its gradient is
// m + sigmoid(-|x|)*(1 - 2m) = sigmoid(x) for every x, including 0.
//
// Gorgonia's own Softplus returns x unchanged for x > 16 (float64) or
// x > 14 (float32), an error of up to 1e-7; it is exact for x <= 0, the only
// range it is called on here. (Gorgonia also rewrites Log1p(Exp(y)) into
// its Softplus, so spelling the formula out would not avoid it.)
func softplus(x *G.Node) (*G.Node, error) {
	pos, _, err := positivePart(x)
	if err != nil {
		return nil, err
	}
	twice, err := G.Mul(pos, constLike(x, 2))
	if err != nil {
		return nil, err
	}
	negAbs, err := G.Sub(x, twice)
	if err != nil {
		return nil, err
	}
	tail, err := G.Softplus(negAbs)
	if err != nil {
		return nil, err
	}
	return G.Add(pos, tail)
}

// elu computes pos + alpha*expm1(x - pos) with pos = x*[x >= 0]: x above
// zero, alpha*(exp(x)-1) below.
func elu(x *G.Node) (*G.Node, error) {
	pos, _, err := positivePart(x)
	if err != nil {
		return nil, err
	}
	neg, err := G.Sub(x, pos)
	if err != nil {
		return nil, err
	}
	em1, err := G.Expm1(neg)
	if err != nil {
		return nil, err
	}
	if ELUAlpha != 1 {
		if em1, err = G.Mul(em1, constLike(x, ELUAlpha)); err != nil {
			return nil, err
		}
	}
	return G.Add(pos, em1)
}

// makeSpec marshals cfg into a Spec of the given kind. The configs of this
// package are plain structs, so marshalling cannot fail.
func makeSpec(kind string, cfg any) Spec {
	b, err := json.Marshal(cfg)
	if err != nil {
		// Unreachable for the config structs of this package.
		b = []byte("null")
	}
	return Spec{Kind: kind, Config: b}
}
