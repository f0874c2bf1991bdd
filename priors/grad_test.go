package priors

import (
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// sumLogProb returns sum_n log p(z_n) evaluated in a fresh graph.
func sumLogProb(t *testing.T, p Prior, z []float64, n int) float64 {
	t.Helper()
	lp := runLogProb(t, p, tensor.Float64, z, n)
	var s float64
	for _, v := range lp {
		s += v
	}
	return s
}

// graphGrad returns the gradient of sum_n log p(z_n) with respect to param,
// from gorgonia's symbolic differentiation.
func graphGrad(t *testing.T, p Prior, param *layers.Param, z []float64, n int) []float64 {
	t.Helper()
	g := G.NewGraph()
	s := layers.NewScope(g)
	zn := inputNode(g, tensor.Float64, z, n, p.Dim(), "z")
	lp, err := p.LogProb(s, zn)
	if err != nil {
		t.Fatal(err)
	}
	cost, err := G.Sum(lp)
	if err != nil {
		t.Fatal(err)
	}
	pn := s.Bind(param)
	if _, err := G.Grad(cost, pn); err != nil {
		t.Fatal(err)
	}
	vm := G.NewTapeMachine(g, G.BindDualValues(pn))
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		t.Fatal(err)
	}
	gv, err := pn.Grad()
	if err != nil {
		t.Fatal(err)
	}
	return mustValues(t, gv.(*tensor.Dense))
}

// checkGrad compares graphGrad with central finite differences.
func checkGrad(t *testing.T, p Prior, z []float64, n int) {
	t.Helper()
	params := p.Params()
	if len(params) == 0 {
		t.Fatal("prior has no parameters")
	}
	for _, param := range params {
		x0 := mustValues(t, param.Value)
		got := graphGrad(t, p, param, z, n)
		f := func(x []float64) float64 {
			setParam(t, param, x)
			defer setParam(t, param, x0)
			return sumLogProb(t, p, z, n)
		}
		// reference: gonum diff/fd Gradient, central differences
		want := fd.Gradient(nil, f, append([]float64(nil), x0...), &fd.Settings{Formula: fd.Central})
		if len(got) != len(want) {
			t.Fatalf("%s: gradient has %d values, want %d", param.Name, len(got), len(want))
		}
		for i := range want {
			// Central differences in float64 are accurate to about 1e-9
			// here, so 1e-6 relative separates a wrong gradient clearly.
			if !closeRel(got[i], want[i], 1e-6) {
				t.Errorf("%s[%d]: graph gradient %.10g, finite difference %.10g", param.Name, i, got[i], want[i])
			}
		}
	}
}

func TestDiagonalGradient(t *testing.T) {
	p, err := NewDiagonal("prior", 3, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	setParam(t, p.Params()[0], []float64{0.3, -0.2, 1})
	setParam(t, p.Params()[1], []float64{0.1, -0.4, 0.6})
	checkGrad(t, p, randVals(40, 4*3, 1, 0), 4)
}

func TestMixtureGradient(t *testing.T) {
	p := newTestMixture(t, tensor.Float64)
	checkGrad(t, p, randVals(41, 5*2, 1.5, 0), 5)
}

func TestVampGradient(t *testing.T) {
	// Pseudo-inputs through a tiny Dense encoder and the Gaussian head.
	opt := layers.Options{Dtype: tensor.Float64, Seed: 4}
	enc, err := layers.NewDense("enc", 3, 4, opt)
	if err != nil {
		t.Fatal(err)
	}
	head, err := layers.NewGaussianHead("head", 4, 2, opt)
	if err != nil {
		t.Fatal(err)
	}
	p, err := NewVamp("vamp", 3, []int{3}, enc, head, VampOptions{Dtype: tensor.Float64, Seed: 8})
	if err != nil {
		t.Fatal(err)
	}
	checkGrad(t, p, randVals(42, 4*2, 1, 0), 4)
}
