package layers

import (
	"fmt"

	G "gorgonia.org/gorgonia"
)

// Sequential applies its layers one after another; it is itself a Layer.
// It is the natural way to build an encoder body or a decoder, for example
// Dense, Reshape, Upsample, Conv2D, ... for a convolutional decoder.
type Sequential struct {
	name   string
	layers []Layer
}

// NewSequential returns a Sequential of the given layers (at least one, none
// nil). Parameter names must be unique across the layers: two layers with
// the same parameter name would silently share a checkpoint entry, so that
// is an error. (Applying the same layer object twice is allowed with
// Forward; put it in the list once.)
func NewSequential(name string, layers ...Layer) (*Sequential, error) {
	const where = "layers.NewSequential"
	if len(layers) == 0 {
		return nil, argError(where, "layers", "none given for %q", name)
	}
	seen := make(map[string]int)
	for i, l := range layers {
		if l == nil {
			return nil, argError(where, fmt.Sprintf("layers[%d]", i), "nil layer in %q", name)
		}
		for _, p := range l.Params() {
			if p == nil {
				return nil, argError(where, fmt.Sprintf("layers[%d]", i), "nil parameter in %q", name)
			}
			if j, dup := seen[p.Name]; dup {
				return nil, argError(where, fmt.Sprintf("layers[%d]", i), "parameter name %q already used by layers[%d] in %q", p.Name, j, name)
			}
			seen[p.Name] = i
		}
	}
	return &Sequential{name: name, layers: append([]Layer(nil), layers...)}, nil
}

// Name returns the layer's name.
func (q *Sequential) Name() string { return q.name }

// Layers returns the layers in order.
func (q *Sequential) Layers() []Layer { return append([]Layer(nil), q.layers...) }

// Params returns the layers' parameters in layer order.
func (q *Sequential) Params() []*Param {
	var ps []*Param
	for _, l := range q.layers {
		ps = append(ps, l.Params()...)
	}
	return ps
}

// Forward applies the layers in order.
func (q *Sequential) Forward(s *Scope, x *G.Node) (*G.Node, error) {
	where := "layers.Sequential(" + q.name + ").Forward"
	if x == nil {
		return nil, argError(where, "x", "nil node")
	}
	h := x
	for i, l := range q.layers {
		var err error
		if h, err = l.Forward(s, h); err != nil {
			return nil, fmt.Errorf("%s: layer %d: %w", where, i, err)
		}
		if h == nil {
			return nil, fmt.Errorf("%s: layer %d returned a nil node without an error", where, i)
		}
	}
	return h, nil
}

// Spec describes the layer (kind "sequential") with the Specs of its
// layers. A layer that does not implement Describer is recorded with an
// empty Kind, which FromSpec rejects.
func (q *Sequential) Spec() Spec {
	cfg := sequentialConfig{Name: q.name}
	for _, l := range q.layers {
		var sp Spec
		if d, ok := l.(Describer); ok {
			sp = d.Spec()
		} else {
			sp = Spec{Kind: "", Config: []byte(fmt.Sprintf("{\"type\":%q}", fmt.Sprintf("%T", l)))}
		}
		cfg.Layers = append(cfg.Layers, sp)
	}
	return makeSpec(kindSequential, cfg)
}

type sequentialConfig struct {
	Name   string `json:"name"`
	Layers []Spec `json:"layers"`
}
