package layers

import (
	"math"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
	G "gorgonia.org/gorgonia"
)

// TestDenseOnMarkedDataSkipsInputGradient builds a Dense layer on an input
// marked with Scope.MarkData, takes the gradient of Sum(R ⊙ (x W + b))
// with respect to W and b, and checks that the graph holds no product
// computing the gradient with respect to x (no Gemm with transB, which
// only dx = d Wᵀ uses), that asking for that gradient fails, and that the
// parameter gradients are the closed forms dW = xᵀ R and db = column sums
// of R, computed with gonum's mat (outside this project).
func TestDenseOnMarkedDataSkipsInputGradient(t *testing.T) {
	const n, in, out = 5, 7, 3
	xT, rT := randTensor(1, 1, n, in), randTensor(2, 1, n, out)
	build := func(mark bool) (*G.ExprGraph, *G.Node, *Dense, *Scope, *G.Node) {
		g := G.NewGraph()
		x := input(g, "x", xT)
		s := NewScope(g)
		if mark {
			s.MarkData(x)
		}
		d, err := NewDense("d", in, out, Options{Dtype: xT.Dtype(), Seed: 3})
		if err != nil {
			t.Fatal(err)
		}
		y, err := d.Forward(s, x)
		if err != nil {
			t.Fatal(err)
		}
		loss := G.Must(G.Sum(G.Must(G.HadamardProd(input(g, "R", rT), y))))
		return g, x, d, s, loss
	}

	g, x, d, s, loss := build(true)
	if !s.IsData(x) {
		t.Fatal("IsData(x) = false after MarkData(x)")
	}
	if _, err := G.Grad(loss, s.Nodes()...); err != nil {
		t.Fatal(err)
	}
	for _, nd := range g.AllNodes() {
		if op := nd.Op(); op != nil && strings.Contains(op.String(), "transB=true") {
			t.Errorf("graph on marked data has the input-gradient product %v", nd)
		}
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	if err := m.RunAll(); err != nil {
		t.Fatal(err)
	}
	X := mat.NewDense(n, in, toF64(xT.Data()))
	R := mat.NewDense(n, out, toF64(rT.Data()))
	var wantW mat.Dense
	wantW.Mul(X.T(), R)
	nodes := s.Nodes()
	gw, err := nodes[0].Grad()
	if err != nil {
		t.Fatal(err)
	}
	gb, err := nodes[1].Grad()
	if err != nil {
		t.Fatal(err)
	}
	for i, v := range toF64(gw.Data()) {
		if want := wantW.RawMatrix().Data[i]; math.Abs(v-want) > 1e-12*(1+math.Abs(want)) {
			t.Errorf("dW[%d] = %v, want %v", i, v, want)
		}
	}
	for j, v := range toF64(gb.Data()) {
		want := mat.Sum(R.ColView(j))
		if math.Abs(v-want) > 1e-12*(1+math.Abs(want)) {
			t.Errorf("db[%d] = %v, want %v", j, v, want)
		}
	}
	_ = d

	// Unmarked, the gradient with respect to x is there; marked, asking
	// for it is gorgonia's non-differentiable error.
	_, x2, _, _, loss2 := build(false)
	if _, err := G.Grad(loss2, x2); err != nil {
		t.Errorf("unmarked input: G.Grad: %v", err)
	}
	_, x3, _, _, loss3 := build(true)
	if _, err := G.Grad(loss3, x3); err == nil {
		t.Error("marked input: G.Grad with respect to it succeeded, want an error")
	}
}
