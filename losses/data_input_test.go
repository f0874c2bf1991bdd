package losses_test

import (
	"math"
	"math/rand/v2"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// TestBernoulliOnMarkedDataSkipsInputGradient checks that Bernoulli.LogProb
// of observations marked with Scope.MarkData builds no gradient with
// respect to them (no BernoulliLogProbRowsGradX node) and that the
// gradient of the summed log-likelihood with respect to the logits is the
// closed form x - sigmoid(l) (the derivative of x log sigmoid(l) + (1-x)
// log sigmoid(-l)), evaluated with package math.
func TestBernoulliOnMarkedDataSkipsInputGradient(t *testing.T) {
	rng := rand.New(rand.NewPCG(30, 31))
	const n, f = 3, 11
	xv, lv := make([]float64, n*f), make([]float64, n*f)
	for i := range xv {
		xv[i] = float64(rng.IntN(2))
		lv[i] = rng.Float64()*12 - 6
	}
	g := G.NewGraph()
	s := layers.NewScope(g)
	x := G.NewMatrix(g, tensor.Float64, G.WithShape(n, f), G.WithName("x"),
		G.WithValue(tensor.New(tensor.WithShape(n, f), tensor.WithBacking(xv))))
	l := G.NewMatrix(g, tensor.Float64, G.WithShape(n, f), G.WithName("l"),
		G.WithValue(tensor.New(tensor.WithShape(n, f), tensor.WithBacking(lv))))
	s.MarkData(x)
	lp, err := losses.Bernoulli{}.LogProb(s, x, l)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := G.Grad(G.Must(G.Sum(lp)), l); err != nil {
		t.Fatal(err)
	}
	for _, nd := range g.AllNodes() {
		if op := nd.Op(); op != nil && op.String() == "BernoulliLogProbRowsGradX" {
			t.Errorf("graph on marked data computes the gradient with respect to x: %v", nd)
		}
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	if err := m.RunAll(); err != nil {
		t.Fatal(err)
	}
	gl, err := l.Grad()
	if err != nil {
		t.Fatal(err)
	}
	for i, v := range gl.Data().([]float64) {
		want := xv[i] - 1/(1+math.Exp(-lv[i]))
		if math.Abs(v-want) > 1e-14 {
			t.Errorf("d/dl[%d] = %v, want %v", i, v, want)
		}
	}
}
