package layers

import (
	"fmt"
	"strconv"

	G "gorgonia.org/gorgonia"
)

// MLPConfig describes a multilayer perceptron.
type MLPConfig struct {
	// Sizes lists the widths: input, hidden layers..., output. At least two
	// entries, each >= 1. Two entries make a single Dense layer.
	Sizes []int `json:"sizes"`
	// Activation follows every hidden layer. The zero value means ReLU.
	Activation Activation `json:"activation"`
	// Output follows the last layer. The zero value means Identity.
	Output Activation `json:"output"`
}

// MLP is a stack of Dense layers named name.0, name.1, ... with Activation
// after each hidden layer and Output after the last. Its parameters are
// name.0.weight, name.0.bias, name.1.weight, ...
type MLP struct {
	name   string
	cfg    MLPConfig
	layers []*Dense
}

// NewMLP returns an MLP. With opt.Init = InitAuto each Dense layer takes the
// scheme that suits the activation that follows it.
func NewMLP(name string, cfg MLPConfig, opt Options) (*MLP, error) {
	const where = "layers.NewMLP"
	if name == "" {
		return nil, argError(where, "name", "empty")
	}
	if len(cfg.Sizes) < 2 {
		return nil, argError(where, "cfg.Sizes", "%v for layer %q, want at least input and output sizes", cfg.Sizes, name)
	}
	for i, n := range cfg.Sizes {
		if n < 1 {
			return nil, argError(where, fmt.Sprintf("cfg.Sizes[%d]", i), "%d for layer %q, want >= 1", n, name)
		}
	}
	cfg.Sizes = append([]int(nil), cfg.Sizes...)
	cfg.Activation = cfg.Activation.orDefault(ReLU)
	cfg.Output = cfg.Output.orDefault(Identity)
	if err := cfg.Activation.check(where, "cfg.Activation"); err != nil {
		return nil, err
	}
	if err := cfg.Output.check(where, "cfg.Output"); err != nil {
		return nil, err
	}
	m := &MLP{name: name, cfg: cfg}
	for i := 0; i+1 < len(cfg.Sizes); i++ {
		act := cfg.Activation
		if i+2 == len(cfg.Sizes) {
			act = cfg.Output
		}
		d, err := newDense(where, name+"."+strconv.Itoa(i), cfg.Sizes[i], cfg.Sizes[i+1], opt, act)
		if err != nil {
			return nil, err
		}
		m.layers = append(m.layers, d)
	}
	return m, nil
}

// Name returns the layer's name.
func (m *MLP) Name() string { return m.name }

// Config returns a copy of the configuration with defaults filled in.
func (m *MLP) Config() MLPConfig {
	c := m.cfg
	c.Sizes = append([]int(nil), c.Sizes...)
	return c
}

// Layers returns the Dense layers in order.
func (m *MLP) Layers() []*Dense { return append([]*Dense(nil), m.layers...) }

// In returns the input width.
func (m *MLP) In() int { return m.cfg.Sizes[0] }

// Out returns the output width.
func (m *MLP) Out() int { return m.cfg.Sizes[len(m.cfg.Sizes)-1] }

// Params returns the parameters layer by layer: weight then bias.
func (m *MLP) Params() []*Param {
	var ps []*Param
	for _, d := range m.layers {
		ps = append(ps, d.Params()...)
	}
	return ps
}

// Forward applies the layers to x of shape (N, Sizes[0]).
func (m *MLP) Forward(s *Scope, x *G.Node) (*G.Node, error) {
	where := "layers.MLP(" + m.name + ").Forward"
	h := x
	for i, d := range m.layers {
		act := m.cfg.Activation
		if i+1 == len(m.layers) {
			act = m.cfg.Output
		}
		// Each layer and its activation run as one fused op.
		var err error
		if h, err = d.forward("layers.Dense("+d.name+").Forward", s, h, act); err != nil {
			return nil, fmt.Errorf("%s: %w", where, err)
		}
	}
	return h, nil
}

// Spec describes the layer (kind "mlp").
func (m *MLP) Spec() Spec {
	return makeSpec(kindMLP, mlpConfig{Name: m.name, MLPConfig: m.Config()})
}

type mlpConfig struct {
	Name string `json:"name"`
	MLPConfig
}
