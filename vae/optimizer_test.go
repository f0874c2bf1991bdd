package vae

import (
	"math"
	"math/rand/v2"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// optimiserCase runs our updater and a gorgonia solver side by side for a
// few steps on the same parameters and random gradients, float64, and
// returns the largest relative difference of the parameters.
func optimiserCase(t *testing.T, ours updater, theirs G.Solver) float64 {
	t.Helper()
	rng := rand.New(rand.NewPCG(1, 2))
	shapes := [][]int{{3, 4}, {1, 4}, {5}}
	var mine, ref []*tensor.Dense
	var nodes []*G.Node
	g := G.NewGraph()
	for i, s := range shapes {
		n := 1
		for _, d := range s {
			n *= d
		}
		v := make([]float64, n)
		for j := range v {
			v[j] = rng.NormFloat64()
		}
		mine = append(mine, tensor.New(tensor.WithShape(s...), tensor.WithBacking(append([]float64(nil), v...))))
		rt := tensor.New(tensor.WithShape(s...), tensor.WithBacking(append([]float64(nil), v...)))
		ref = append(ref, rt)
		nodes = append(nodes, G.NewTensor(g, tensor.Float64, len(s), G.WithShape(s...), G.WithValue(rt), G.WithName(string(rune('a'+i)))))
	}
	var worst float64
	for step := 0; step < 7; step++ {
		var grads []*tensor.Dense
		var vgs []G.ValueGrad
		for i, s := range shapes {
			gv := make([]float64, mine[i].Size())
			for j := range gv {
				gv[j] = rng.NormFloat64() * math.Pow(10, float64(j%3-1))
			}
			grads = append(grads, tensor.New(tensor.WithShape(s...), tensor.WithBacking(append([]float64(nil), gv...))))
			gt := tensor.New(tensor.WithShape(s...), tensor.WithBacking(append([]float64(nil), gv...)))
			vgs = append(vgs, valueGrad{v: ref[i], g: gt})
		}
		if bad, err := ours.step(mine, grads); err != nil || bad >= 0 {
			t.Fatalf("step: parameter %d not finite, error %v", bad, err)
		}
		if err := theirs.Step(vgs); err != nil {
			t.Fatal(err)
		}
		for i := range mine {
			a, b := mine[i].Data().([]float64), ref[i].Data().([]float64)
			for j := range a {
				worst = math.Max(worst, math.Abs(a[j]-b[j])/math.Max(1e-12, math.Abs(b[j])))
			}
		}
	}
	_ = nodes
	return worst
}

// valueGrad is a gorgonia ValueGrad over plain tensors.
type valueGrad struct{ v, g *tensor.Dense }

func (v valueGrad) Value() G.Value         { return v.v }
func (v valueGrad) Grad() (G.Value, error) { return v.g, nil }

// reference: gorgonia's AdamSolver (an implementation outside this
// project) with the same settings; both follow Kingma and Ba 2015,
// Algorithm 1.
func TestAdamMatchesGorgonia(t *testing.T) {
	worst := optimiserCase(t, &adam{lr: 0.01, beta1: 0.9, beta2: 0.999, eps: 1e-8},
		G.NewAdamSolver(G.WithLearnRate(0.01), G.WithBeta1(0.9), G.WithBeta2(0.999), G.WithEps(1e-8)))
	if worst > 1e-9 {
		t.Errorf("parameters differ from gorgonia's Adam by up to %v (relative)", worst)
	}
}

// reference: gorgonia's Momentum and VanillaSolver.
func TestSGDMatchesGorgonia(t *testing.T) {
	if w := optimiserCase(t, &sgd{lr: 0.05}, G.NewVanillaSolver(G.WithLearnRate(0.05))); w > 1e-12 {
		t.Errorf("plain SGD differs from gorgonia's by up to %v", w)
	}
	if w := optimiserCase(t, &sgd{lr: 0.05, momentum: 0.9}, G.NewMomentum(G.WithLearnRate(0.05), G.WithMomentum(0.9))); w > 1e-12 {
		t.Errorf("SGD with momentum differs from gorgonia's by up to %v", w)
	}
}

// TestNonFiniteUpdateIsUndone: an update that overflows in the last of
// three parameters is reported with that parameter's index, and every
// parameter (the two updated before it included) holds its value from
// before the step, bit for bit. float64 SGD with learning rate 1e300: a
// gradient of 1e-3 moves a weight by 1e297 (finite), one of 1e10 by 1e310,
// above math.MaxFloat64 (IEEE 754 binary64: about 1.8e308).
func TestNonFiniteUpdateIsUndone(t *testing.T) {
	mk := func(vals ...float64) *tensor.Dense {
		return tensor.New(tensor.WithShape(len(vals)), tensor.WithBacking(vals))
	}
	for _, opt := range []updater{&sgd{lr: 1e300}, &sgd{lr: 1e300, momentum: 0.5}} {
		params := []*tensor.Dense{mk(1, -2, 3), mk(0.5), mk(4, 5)}
		before := make([][]float64, len(params))
		for i, p := range params {
			before[i] = append([]float64(nil), p.Data().([]float64)...)
		}
		// A good step first, so the shadow buffers hold older values
		// than the ones to restore.
		small := []*tensor.Dense{mk(0, 0, 0), mk(0), mk(0, 0)}
		if bad, err := opt.step(params, small); err != nil || bad != -1 {
			t.Fatalf("a zero gradient: bad %d, error %v", bad, err)
		}
		grads := []*tensor.Dense{mk(1e-3, -1e-3, 0), mk(1e-3), mk(1e-3, 1e10)}
		bad, err := opt.step(params, grads)
		if err != nil {
			t.Fatal(err)
		}
		if bad != 2 {
			t.Errorf("%+v: bad parameter %d, want 2", opt, bad)
		}
		for i, p := range params {
			for j, v := range p.Data().([]float64) {
				if math.Float64bits(v) != math.Float64bits(before[i][j]) {
					t.Errorf("%+v: parameter %d[%d] is %v after the undone step, was %v", opt, i, j, v, before[i][j])
				}
			}
		}
	}
}

// benchParams returns float32 parameters and gradients of the sizes of the
// standard MLP VAE (784-400-20: about 650 thousand values).
func benchParams() (params, grads []*tensor.Dense) {
	rng := rand.New(rand.NewPCG(1, 1))
	for _, s := range [][]int{{784, 400}, {1, 400}, {400, 20}, {1, 20}, {400, 20}, {1, 20}, {20, 400}, {1, 400}, {400, 784}, {1, 784}} {
		n := s[0] * s[1]
		w, g := make([]float32, n), make([]float32, n)
		for i := range w {
			w[i], g[i] = float32(rng.NormFloat64()), float32(rng.NormFloat64())
		}
		params = append(params, tensor.New(tensor.WithShape(s...), tensor.WithBacking(w)))
		grads = append(grads, tensor.New(tensor.WithShape(s...), tensor.WithBacking(g)))
	}
	return params, grads
}

// BenchmarkAdamStep is one Adam step over the standard model's parameters,
// finiteness check and previous-value copy included.
func BenchmarkAdamStep(b *testing.B) {
	params, grads := benchParams()
	opt := &adam{lr: 1e-6, beta1: 0.9, beta2: 0.999, eps: 1e-8}
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if bad, err := opt.step(params, grads); err != nil || bad >= 0 {
			b.Fatal(bad, err)
		}
	}
}
