package vae

import (
	"fmt"
	"math"

	"gorgonia.org/tensor"
)

// updater applies one optimiser step to parameters given their gradients.
// The trainer's updaters work in place in one pass over each tensor, with
// no allocation after the first step.
type updater interface {
	step(params, grads []*tensor.Dense) error
}

func newUpdater(cfg TrainConfig) updater {
	if cfg.Optimizer == SGD {
		return &sgd{lr: cfg.LearnRate, momentum: cfg.Momentum}
	}
	return &adam{lr: cfg.LearnRate, beta1: 0.9, beta2: 0.999, eps: 1e-8}
}

// adam is Adam as in Kingma and Ba 2015, Algorithm 1:
//
//	m = beta1*m + (1-beta1)*g
//	v = beta2*v + (1-beta2)*g^2
//	w = w - lr * (m / (1-beta1^t)) / (sqrt(v / (1-beta2^t)) + eps)
//
// with the moments kept in the parameters' dtype (float32 moments are what
// common practice uses for float32 training).
type adam struct {
	lr, beta1, beta2, eps float64
	t                     int
	m, v                  []any // []float32 or []float64 per parameter
}

func (a *adam) step(params, grads []*tensor.Dense) error {
	if len(grads) != len(params) || (a.m != nil && len(a.m) != len(params)) {
		return fmt.Errorf("vae: optimiser: %d parameters and %d gradients, want %d", len(params), len(grads), len(a.m))
	}
	if a.m == nil {
		a.m = make([]any, len(params))
		a.v = make([]any, len(params))
		for i, p := range params {
			switch p.Data().(type) {
			case []float32:
				a.m[i], a.v[i] = make([]float32, p.Size()), make([]float32, p.Size())
			default:
				a.m[i], a.v[i] = make([]float64, p.Size()), make([]float64, p.Size())
			}
		}
	}
	a.t++
	c1 := 1 - math.Pow(a.beta1, float64(a.t))
	c2 := 1 - math.Pow(a.beta2, float64(a.t))
	for i := range params {
		switch w := params[i].Data().(type) {
		case []float32:
			g, ok := grads[i].Data().([]float32)
			if !ok || len(g) != len(w) {
				return fmt.Errorf("vae: optimiser: gradient %d does not match its parameter", i)
			}
			adamUpdate(w, g, a.m[i].([]float32), a.v[i].([]float32), a, c1, c2)
		case []float64:
			g, ok := grads[i].Data().([]float64)
			if !ok || len(g) != len(w) {
				return fmt.Errorf("vae: optimiser: gradient %d does not match its parameter", i)
			}
			adamUpdate(w, g, a.m[i].([]float64), a.v[i].([]float64), a, c1, c2)
		default:
			return fmt.Errorf("vae: optimiser: parameter %d has dtype %v", i, params[i].Dtype())
		}
	}
	return nil
}

func adamUpdate[T float32 | float64](w, g, m, v []T, a *adam, c1, c2 float64) {
	b1, b2 := T(a.beta1), T(a.beta2)
	ob1, ob2 := T(1-a.beta1), T(1-a.beta2)
	lr, eps := T(a.lr), T(a.eps)
	ic1, ic2 := T(1/c1), T(1/c2)
	m, v, g = m[:len(w)], v[:len(w)], g[:len(w)]
	for j := range w {
		gj := g[j]
		mj := b1*m[j] + ob1*gj
		vj := b2*v[j] + ob2*gj*gj
		m[j], v[j] = mj, vj
		w[j] -= lr * (mj * ic1) / (T(math.Sqrt(float64(vj*ic2))) + eps)
	}
}

// sgd is stochastic gradient descent, with heavy-ball momentum when
// momentum > 0 (Polyak 1964; the form v = momentum*v + g, w = w - lr*v is
// common practice).
type sgd struct {
	lr, momentum float64
	vel          [][]float64
}

func (s *sgd) step(params, grads []*tensor.Dense) error {
	if len(grads) != len(params) {
		return fmt.Errorf("vae: optimiser: %d parameters and %d gradients", len(params), len(grads))
	}
	if s.momentum > 0 && s.vel == nil {
		s.vel = make([][]float64, len(params))
		for i, p := range params {
			s.vel[i] = make([]float64, p.Size())
		}
	}
	for i := range params {
		var vel []float64
		if s.vel != nil {
			vel = s.vel[i]
		}
		switch w := params[i].Data().(type) {
		case []float32:
			g, ok := grads[i].Data().([]float32)
			if !ok || len(g) != len(w) {
				return fmt.Errorf("vae: optimiser: gradient %d does not match its parameter", i)
			}
			sgdUpdate(w, g, vel, s)
		case []float64:
			g, ok := grads[i].Data().([]float64)
			if !ok || len(g) != len(w) {
				return fmt.Errorf("vae: optimiser: gradient %d does not match its parameter", i)
			}
			sgdUpdate(w, g, vel, s)
		default:
			return fmt.Errorf("vae: optimiser: parameter %d has dtype %v", i, params[i].Dtype())
		}
	}
	return nil
}

func sgdUpdate[T float32 | float64](w, g []T, vel []float64, s *sgd) {
	if vel == nil {
		for j := range w {
			w[j] -= T(s.lr * float64(g[j]))
		}
		return
	}
	for j := range w {
		vel[j] = s.momentum*vel[j] + float64(g[j])
		w[j] -= T(s.lr * vel[j])
	}
}
