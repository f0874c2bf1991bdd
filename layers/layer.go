package layers

import (
	"encoding/json"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/internal/errs"
)

// ErrInvalidArgument is wrapped by every error that reports a bad argument
// (a size of zero, a mismatched shape, an unknown activation). Callers can
// branch on it with errors.Is; the message names the argument.
// It is the SDK's one sentinel for bad arguments: vae, dataset and schedule
// re-export the same value.
var ErrInvalidArgument = errs.InvalidArgument

// argError returns an error wrapping ErrInvalidArgument that names where
// (the function or layer) and which argument is wrong.
func argError(where, arg, format string, a ...any) error {
	return errs.Arg(where, arg, format, a...)
}

// Param is one learnable tensor. Its Name is stable: it is the tensor's name
// in checkpoints, so renaming a parameter breaks reading older files.
//
// The Value is the single copy of the numbers. Every graph that uses the
// parameter binds a node to this same tensor (see Scope), so an optimiser
// step taken through a training graph is seen by every inference graph.
type Param struct {
	Name  string
	Value *tensor.Dense
}

// Layer is one step of an encoder or decoder. Implement it to bring your own
// layer: Forward adds the layer's computation to the graph of x, binding its
// parameters through s, and Params lists the parameters in a fixed order.
//
// Forward may be called on many graphs (one for training, others for
// inference); it must not keep nodes between calls.
type Layer interface {
	Forward(s *Scope, x *G.Node) (*G.Node, error)
	Params() []*Param
}

// Spec describes a built-in layer so that it can be rebuilt without code:
// Kind names the constructor and Config holds its arguments as JSON.
// Spec values are stored in checkpoint metadata.
type Spec struct {
	Kind   string          `json:"kind"`
	Config json.RawMessage `json:"config"`
}

// Describer is implemented by layers that can describe themselves as a Spec.
// Every layer in this package implements it; user layers may too.
type Describer interface {
	Spec() Spec
}

// Scope binds parameters into one gorgonia graph. Each Param gets exactly one
// node per graph, backed by the Param's Value, so layers applied twice in the
// same graph share weights and every graph sees the same numbers.
//
// A Scope is not safe for concurrent use; use one per graph.
type Scope struct {
	g     *G.ExprGraph
	nodes map[*Param]*G.Node
	order []*G.Node
	owner []*Param
	data  map[*G.Node]bool
}

// NewScope returns a Scope for graph g.
func NewScope(g *G.ExprGraph) *Scope {
	return &Scope{g: g, nodes: make(map[*Param]*G.Node)}
}

// Graph returns the graph the scope binds into.
func (s *Scope) Graph() *G.ExprGraph { return s.g }

// Bind returns the node of p in the scope's graph, creating it on first use.
func (s *Scope) Bind(p *Param) *G.Node {
	if n, ok := s.nodes[p]; ok {
		return n
	}
	shape := p.Value.Shape()
	n := G.NewTensor(s.g, p.Value.Dtype(), shape.Dims(), G.WithShape(shape.Clone()...), G.WithName(p.Name), G.WithValue(p.Value))
	s.nodes[p] = n
	s.order = append(s.order, n)
	s.owner = append(s.owner, p)
	return n
}

// Nodes returns the parameter nodes bound so far, in the order of first use.
func (s *Scope) Nodes() []*G.Node { return append([]*G.Node(nil), s.order...) }

// MarkData records that n, an input node of the scope's graph, holds data
// rather than anything trained: no gradient with respect to n is wanted.
// The fused ops of this module applied directly to n (the first Dense
// layer, the Bernoulli likelihood's observations) then build no gradient
// for it, which saves a matrix product of the size of the layer's weight
// gradient per training step. Asking G.Grad for the gradient with respect
// to a marked node fails with gorgonia's non-differentiable error; leave
// n unmarked to have it.
func (s *Scope) MarkData(n *G.Node) {
	if s.data == nil {
		s.data = make(map[*G.Node]bool)
	}
	s.data[n] = true
}

// IsData reports whether n was marked with MarkData (false for a nil
// Scope).
func (s *Scope) IsData(n *G.Node) bool { return s != nil && s.data[n] }

// Params returns the parameters bound so far, in the same order as Nodes.
func (s *Scope) Params() []*Param { return append([]*Param(nil), s.owner...) }
