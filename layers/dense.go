package layers

import (
	"fmt"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// Dense is a fully connected linear map y = x W + b for x of shape (N, in).
// Its parameters are name+".weight", shape (in, out), and name+".bias",
// shape (1, out).
type Dense struct {
	name    string
	in, out int
	weight  *Param
	bias    *Param
}

// NewDense returns a Dense layer. in and out must be at least 1 and name
// must not be empty. The weight is drawn by opt.Init (InitAuto means
// GlorotUniform, since Dense on its own is linear); the bias is zero.
func NewDense(name string, in, out int, opt Options) (*Dense, error) {
	return newDense("layers.NewDense", name, in, out, opt, Identity)
}

// newDense builds a Dense whose InitAuto scheme suits the activation act
// that follows it.
func newDense(where, name string, in, out int, opt Options, act Activation) (*Dense, error) {
	if name == "" {
		return nil, argError(where, "name", "empty")
	}
	if in < 1 {
		return nil, argError(where, "in", "%d for layer %q, want >= 1", in, name)
	}
	if out < 1 {
		return nil, argError(where, "out", "%d for layer %q, want >= 1", out, name)
	}
	dt, err := opt.resolve(where)
	if err != nil {
		return nil, err
	}
	return &Dense{
		name:   name,
		in:     in,
		out:    out,
		weight: newWeight(name+".weight", dt, []int{in, out}, opt.scheme(act), in, out, act, opt.Seed),
		bias:   newZeros(name+".bias", dt, []int{1, out}),
	}, nil
}

// Name returns the layer's name, the prefix of its parameter names.
func (d *Dense) Name() string { return d.name }

// In returns the input width.
func (d *Dense) In() int { return d.in }

// Out returns the output width.
func (d *Dense) Out() int { return d.out }

// Weight returns the (in, out) weight parameter.
func (d *Dense) Weight() *Param { return d.weight }

// Bias returns the (1, out) bias parameter.
func (d *Dense) Bias() *Param { return d.bias }

// Params returns the weight and the bias, in that order.
func (d *Dense) Params() []*Param { return []*Param{d.weight, d.bias} }

// Forward returns x W + b for x of shape (N, in) in the parameters' dtype.
// The product and the bias run as one fused op (see dense_op.go).
func (d *Dense) Forward(s *Scope, x *G.Node) (*G.Node, error) {
	return d.forward("layers.Dense("+d.name+").Forward", s, x, Identity)
}

// forward returns act(x W + b) as one fused op, forward and backward.
func (d *Dense) forward(where string, s *Scope, x *G.Node, act Activation) (*G.Node, error) {
	if err := checkInput(where, s, x, d.weight.Value.Dtype()); err != nil {
		return nil, err
	}
	if sh := x.Shape(); sh.Dims() != 2 || sh[1] != d.in || sh[0] < 1 {
		return nil, argError(where, "x", "shape %v, want (N, %d)", sh, d.in)
	}
	if !fusable(act) {
		// Unreachable for the activations of this package; kept so that
		// a new activation works before it has a fused form.
		y, err := d.forward(where, s, x, Identity)
		if err != nil {
			return nil, err
		}
		return act.Apply(y)
	}
	y, err := G.ApplyOp(&denseOp{act: act, noGradX: s.IsData(x)}, x, s.Bind(d.weight), s.Bind(d.bias))
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return y, nil
}

// Spec describes the layer (kind "dense").
func (d *Dense) Spec() Spec {
	return makeSpec(kindDense, denseConfig{Name: d.name, In: d.in, Out: d.out})
}

type denseConfig struct {
	Name string `json:"name"`
	In   int    `json:"in"`
	Out  int    `json:"out"`
}

// checkInput validates the scope and input node shared by every Forward.
func checkInput(where string, s *Scope, x *G.Node, dt tensor.Dtype) error {
	if s == nil || s.g == nil {
		return argError(where, "s", "nil scope")
	}
	if x == nil {
		return argError(where, "x", "nil node")
	}
	if x.Dtype() != dt {
		return argError(where, "x", "dtype %v, the layer's parameters are %v", x.Dtype(), dt)
	}
	if x.Graph() != s.g {
		return argError(where, "x", "node belongs to another graph than the scope's")
	}
	return nil
}
