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
	// stepParts is step with the work dealt out to parts workers (worker
	// p takes the p-th of parts equal runs of every parameter's values);
	// run calls its argument once for each worker, serially or at once.
	// The result does not depend on parts: each value's update reads only
	// its own state. before, if not nil, is called on each run of values
	// [lo, hi) of parameter i, in pieces of at most updateChunk values,
	// just before they are updated (the lean trainer sums its shards'
	// gradients there, while they are in cache).
	stepParts(params, grads []*tensor.Dense, parts int, run func(func(part int)), before func(i, lo, hi int)) (bad int, err error)
}

// stepper is what an updater does for one step: prepare checks the
// arguments and readies the state (once per step, before any update);
// update changes values [lo, hi) of parameter i and reports whether every
// new value is finite.
type stepper interface {
	prepare(params, grads []*tensor.Dense) error
	update(i, lo, hi int, param, grad *tensor.Dense) bool
	undoAll(params []*tensor.Dense)
}

// partRange returns the part-th of parts runs of n values, cut at
// multiples of 16 values (whole vectors for the kernels).
func partRange(n, part, parts int) (lo, hi int) {
	cut := func(p int) int {
		if p == parts {
			return n
		}
		return min(n, (n*p/parts)&^15)
	}
	return cut(part), cut(part + 1)
}

// partRunner holds one step's arguments for its workers, so that handing
// the work out allocates nothing: fn is r.work, bound once.
type partRunner struct {
	u             stepper
	params, grads []*tensor.Dense
	parts         int
	before        func(i, lo, hi int)
	bads          []int // per worker: its first parameter at fault, or -1
	fn            func(part int)
}

func (r *partRunner) work(part int) {
	first := -1
	for i, p := range r.params {
		lo, hi := partRange(p.Size(), part, r.parts)
		for c := lo; c < hi; c += updateChunk {
			e := min(hi, c+updateChunk)
			if r.before != nil {
				r.before(i, c, e)
			}
			if !r.u.update(i, c, e, p, r.grads[i]) && first < 0 {
				first = i
			}
		}
	}
	r.bads[part] = first
}

// updateChunk is the most values updated at once (a multiple of 16).
const updateChunk = 4096

// runSteps is stepParts for a stepper. If any parameter's update is not
// finite, every parameter is put back and the first such index returned.
func runSteps(u stepper, params, grads []*tensor.Dense, parts int, run func(func(part int)), before func(i, lo, hi int), r *partRunner) (int, error) {
	if err := u.prepare(params, grads); err != nil {
		return -1, err
	}
	if cap(r.bads) < parts {
		r.bads = make([]int, parts)
	}
	if r.fn == nil {
		r.fn = r.work
	}
	r.u, r.params, r.grads, r.parts, r.bads, r.before = u, params, grads, parts, r.bads[:parts], before
	if run == nil || parts == 1 {
		for part := 0; part < parts; part++ {
			r.work(part)
		}
	} else {
		run(r.fn)
	}
	r.params, r.grads, r.before = nil, nil, nil
	bad := -1
	for _, b := range r.bads {
		if b >= 0 && (bad < 0 || b < bad) {
			bad = b
		}
	}
	if bad >= 0 {
		u.undoAll(params)
	}
	return bad, nil
}

// checkGrads reports a gradient that does not match its parameter.
func checkGrads(params, grads []*tensor.Dense) error {
	if len(grads) != len(params) {
		return fmt.Errorf("vae: optimiser: %d parameters and %d gradients", len(params), len(grads))
	}
	// Dtype and Size rather than Data: Data boxes the slice (an
	// allocation per call), and a steady-state step allocates nothing.
	for i, p := range params {
		if dt := p.Dtype(); dt != tensor.Float32 && dt != tensor.Float64 {
			return fmt.Errorf("vae: optimiser: parameter %d has dtype %v", i, dt)
		}
		if grads[i].Dtype() != p.Dtype() || grads[i].Size() != p.Size() {
			return fmt.Errorf("vae: optimiser: gradient %d does not match its parameter", i)
		}
	}
	return nil
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

// undoAll copies the shadow of every parameter back into it.
func (s *shadow) undoAll(params []*tensor.Dense) {
	for i := range params {
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
	// this step's
	prev   []any
	c1, c2 float64
	k32    vecmath.AdamCoeffs
	runner partRunner
}

func (a *adam) step(params, grads []*tensor.Dense) (int, error) {
	return a.stepParts(params, grads, 1, nil, nil)
}

func (a *adam) stepParts(params, grads []*tensor.Dense, parts int, run func(func(int)), before func(i, lo, hi int)) (int, error) {
	return runSteps(a, params, grads, parts, run, before, &a.runner)
}

func (a *adam) prepare(params, grads []*tensor.Dense) error {
	if a.m != nil && len(a.m) != len(params) {
		return fmt.Errorf("vae: optimiser: %d parameters, want %d", len(params), len(a.m))
	}
	if err := checkGrads(params, grads); err != nil {
		return err
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
	a.prev = a.buffers(params)
	a.t++
	a.c1 = 1 - math.Pow(a.beta1, float64(a.t))
	a.c2 = 1 - math.Pow(a.beta2, float64(a.t))
	a.k32 = adamCoeffs32(a, a.c1, a.c2)
	return nil
}

func (a *adam) update(i, lo, hi int, param, grad *tensor.Dense) bool {
	if param.Dtype() == tensor.Float32 {
		return vecmath.Adam32(param.Float32s()[lo:hi], grad.Float32s()[lo:hi], a.m[i].([]float32)[lo:hi], a.v[i].([]float32)[lo:hi], a.prev[i].([]float32)[lo:hi], &a.k32)
	}
	return adamUpdate(param.Float64s()[lo:hi], grad.Float64s()[lo:hi], a.m[i].([]float64)[lo:hi], a.v[i].([]float64)[lo:hi], a.prev[i].([]float64)[lo:hi], a, a.c1, a.c2)
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
		// Subnormal moments become +0, as in vecmath.Adam32.
		mj, vj = flushSubnormal(mj), flushSubnormal(vj)
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
	prev   []any // this step's
	runner partRunner
}

func (s *sgd) step(params, grads []*tensor.Dense) (int, error) {
	return s.stepParts(params, grads, 1, nil, nil)
}

func (s *sgd) stepParts(params, grads []*tensor.Dense, parts int, run func(func(int)), before func(i, lo, hi int)) (int, error) {
	return runSteps(s, params, grads, parts, run, before, &s.runner)
}

func (s *sgd) prepare(params, grads []*tensor.Dense) error {
	if err := checkGrads(params, grads); err != nil {
		return err
	}
	s.prev = s.buffers(params)
	if s.momentum > 0 && s.vel == nil {
		s.vel = make([][]float64, len(params))
		for i, p := range params {
			s.vel[i] = make([]float64, p.Size())
		}
	}
	return nil
}

func (s *sgd) update(i, lo, hi int, param, grad *tensor.Dense) bool {
	var vel []float64
	if s.vel != nil {
		vel = s.vel[i][lo:hi]
	}
	if param.Dtype() == tensor.Float32 {
		return sgdUpdate(param.Float32s()[lo:hi], grad.Float32s()[lo:hi], vel, s.prev[i].([]float32)[lo:hi], s)
	}
	return sgdUpdate(param.Float64s()[lo:hi], grad.Float64s()[lo:hi], vel, s.prev[i].([]float64)[lo:hi], s)
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

// flushSubnormal is vecmath.FlushSubnormal32 or FlushSubnormal64 by T.
func flushSubnormal[T float32 | float64](x T) T {
	if v, ok := any(x).(float32); ok {
		return T(vecmath.FlushSubnormal32(v))
	}
	return T(vecmath.FlushSubnormal64(float64(x)))
}
