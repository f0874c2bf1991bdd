package vae

import (
	"fmt"
	"math"

	"gorgonia.org/tensor"

	"lowerbound.dev/internal/vecmath"
)

// updater applies one optimiser step to parameters given their gradients.
// The trainer's updaters work in place in one pass over each tensor, with
// no allocation after the first step.
//
// In the same pass they keep each parameter's previous values and check
// the new ones. If an updated value is NaN or infinite, step puts every
// parameter back as it was before the step and returns the index of the
// first parameter at fault (bad >= 0); otherwise bad is -1. After a bad
// step the updater's own state (moments, velocities) is spent: training
// stops there.
type updater interface {
	step(params, grads []*tensor.Dense) (bad int, err error)
}

// shadow holds the values the parameters had before the current step.
type shadow struct {
	prev []any // []float32 or []float64 per parameter
}

// buffers returns the shadow buffer of every parameter, allocating them on
// first use.
func (s *shadow) buffers(params []*tensor.Dense) []any {
	if s.prev == nil {
		s.prev = make([]any, len(params))
		for i, p := range params {
			switch p.Data().(type) {
			case []float32:
				s.prev[i] = make([]float32, p.Size())
			default:
				s.prev[i] = make([]float64, p.Size())
			}
		}
	}
	return s.prev
}

// undo copies the shadow of parameters 0..last back into them.
func (s *shadow) undo(params []*tensor.Dense, last int) {
	for i := 0; i <= last; i++ {
		switch w := params[i].Data().(type) {
		case []float32:
			copy(w, s.prev[i].([]float32))
		case []float64:
			copy(w, s.prev[i].([]float64))
		}
	}
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
	shadow
}

func (a *adam) step(params, grads []*tensor.Dense) (int, error) {
	if len(grads) != len(params) || (a.m != nil && len(a.m) != len(params)) {
		return -1, fmt.Errorf("vae: optimiser: %d parameters and %d gradients, want %d", len(params), len(grads), len(a.m))
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
	prev := a.buffers(params)
	a.t++
	c1 := 1 - math.Pow(a.beta1, float64(a.t))
	c2 := 1 - math.Pow(a.beta2, float64(a.t))
	k32 := adamCoeffs32(a, c1, c2)
	for i := range params {
		finite := true
		switch w := params[i].Data().(type) {
		case []float32:
			g, ok := grads[i].Data().([]float32)
			if !ok || len(g) != len(w) {
				a.undo(params, i-1)
				return -1, fmt.Errorf("vae: optimiser: gradient %d does not match its parameter", i)
			}
			finite = vecmath.Adam32(w, g, a.m[i].([]float32), a.v[i].([]float32), prev[i].([]float32), &k32)
		case []float64:
			g, ok := grads[i].Data().([]float64)
			if !ok || len(g) != len(w) {
				a.undo(params, i-1)
				return -1, fmt.Errorf("vae: optimiser: gradient %d does not match its parameter", i)
			}
			finite = adamUpdate(w, g, a.m[i].([]float64), a.v[i].([]float64), prev[i].([]float64), a, c1, c2)
		default:
			a.undo(params, i-1)
			return -1, fmt.Errorf("vae: optimiser: parameter %d has dtype %v", i, params[i].Dtype())
		}
		if !finite {
			a.undo(params, i)
			return i, nil
		}
	}
	return -1, nil
}

// adamCoeffs32 returns the float32 scalars of a step for vecmath.Adam32,
// which runs the float32 form of adamUpdate below operation for operation
// (vectorised on amd64) and gives the same bits.
func adamCoeffs32(a *adam, c1, c2 float64) vecmath.AdamCoeffs {
	return vecmath.AdamCoeffs{
		B1: float32(a.beta1), OB1: float32(1 - a.beta1), B2: float32(a.beta2), OB2: float32(1 - a.beta2),
		LR: float32(a.lr), Eps: float32(a.eps), IC1: float32(1 / c1), IC2: float32(1 / c2),
	}
}

// adamUpdate updates w in place, keeping its previous values in prev, and
// reports whether every new value is finite.
func adamUpdate[T float32 | float64](w, g, m, v, prev []T, a *adam, c1, c2 float64) bool {
	b1, b2 := T(a.beta1), T(a.beta2)
	ob1, ob2 := T(1-a.beta1), T(1-a.beta2)
	lr, eps := T(a.lr), T(a.eps)
	ic1, ic2 := T(1/c1), T(1/c2)
	m, v, g, prev = m[:len(w)], v[:len(w)], g[:len(w)], prev[:len(w)]
	// check stays 0 while every new value is finite: x - x is 0 for a
	// finite x and NaN for an infinite or NaN one, and NaN sticks.
	var check T
	for j := range w {
		gj := g[j]
		mj := b1*m[j] + ob1*gj
		vj := b2*v[j] + ob2*gj*gj
		m[j], v[j] = mj, vj
		wj := w[j]
		prev[j] = wj
		wj -= lr * (mj * ic1) / (T(math.Sqrt(float64(vj*ic2))) + eps)
		w[j] = wj
		check += wj - wj
	}
	return check == 0
}

// sgd is stochastic gradient descent, with heavy-ball momentum when
// momentum > 0 (Polyak 1964; the form v = momentum*v + g, w = w - lr*v is
// common practice).
type sgd struct {
	lr, momentum float64
	vel          [][]float64
	shadow
}

func (s *sgd) step(params, grads []*tensor.Dense) (int, error) {
	if len(grads) != len(params) {
		return -1, fmt.Errorf("vae: optimiser: %d parameters and %d gradients", len(params), len(grads))
	}
	prev := s.buffers(params)
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
		finite := true
		switch w := params[i].Data().(type) {
		case []float32:
			g, ok := grads[i].Data().([]float32)
			if !ok || len(g) != len(w) {
				s.undo(params, i-1)
				return -1, fmt.Errorf("vae: optimiser: gradient %d does not match its parameter", i)
			}
			finite = sgdUpdate(w, g, vel, prev[i].([]float32), s)
		case []float64:
			g, ok := grads[i].Data().([]float64)
			if !ok || len(g) != len(w) {
				s.undo(params, i-1)
				return -1, fmt.Errorf("vae: optimiser: gradient %d does not match its parameter", i)
			}
			finite = sgdUpdate(w, g, vel, prev[i].([]float64), s)
		default:
			s.undo(params, i-1)
			return -1, fmt.Errorf("vae: optimiser: parameter %d has dtype %v", i, params[i].Dtype())
		}
		if !finite {
			s.undo(params, i)
			return i, nil
		}
	}
	return -1, nil
}

// sgdUpdate updates w in place, keeping its previous values in prev, and
// reports whether every new value is finite (see adamUpdate).
func sgdUpdate[T float32 | float64](w, g []T, vel []float64, prev []T, s *sgd) bool {
	prev = prev[:len(w)]
	var check T
	if vel == nil {
		for j := range w {
			wj := w[j]
			prev[j] = wj
			wj -= T(s.lr * float64(g[j]))
			w[j] = wj
			check += wj - wj
		}
		return check == 0
	}
	for j := range w {
		vel[j] = s.momentum*vel[j] + float64(g[j])
		wj := w[j]
		prev[j] = wj
		wj -= T(s.lr * vel[j])
		w[j] = wj
		check += wj - wj
	}
	return check == 0
}
