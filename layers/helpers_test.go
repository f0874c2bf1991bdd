package layers

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/floats"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// randTensor returns a float64 tensor of the given shape with entries
// uniform in [-scale, scale) drawn from a PCG source seeded with seed.
func randTensor(seed uint64, scale float64, shape ...int) *tensor.Dense {
	rng := rand.New(rand.NewPCG(seed, 7))
	t := tensor.New(tensor.Of(tensor.Float64), tensor.WithShape(shape...))
	for i, d := 0, t.Data().([]float64); i < len(d); i++ {
		d[i] = (2*rng.Float64() - 1) * scale
	}
	return t
}

// input returns a node named name in g bound to t.
func input(g *G.ExprGraph, name string, t *tensor.Dense) *G.Node {
	sh := t.Shape()
	return G.NewTensor(g, t.Dtype(), sh.Dims(), G.WithShape(sh.Clone()...), G.WithName(name), G.WithValue(t))
}

// testLoss returns sum_i sum(R_i * out_i) + 0.5 * sum(out_i^2), a scalar
// whose gradient exercises every output entry, with fixed random R_i.
func testLoss(t *testing.T, g *G.ExprGraph, outs []*G.Node) *G.Node {
	t.Helper()
	var terms G.Nodes
	for i, o := range outs {
		r := input(g, "R"+string(rune('0'+i)), randTensor(uint64(100+i), 1, o.Shape()...))
		lin := G.Must(G.Sum(G.Must(G.HadamardProd(r, o))))
		sq := G.Must(G.Sum(G.Must(G.Square(o))))
		half := G.Must(G.Mul(sq, G.NewConstant(0.5)))
		terms = append(terms, G.Must(G.Add(lin, half)))
	}
	if len(terms) == 1 {
		return terms[0]
	}
	return G.Must(G.ReduceAdd(terms))
}

// checkGradients compares the symbolic gradients of testLoss over the
// outputs of build, with respect to every parameter the scope binds and to
// the input x, against central finite differences from gonum diff/fd.
//
// reference: gonum diff/fd.Gradient with fd.Central (second-order central
// difference (f(x+h) - f(x-h)) / 2h) and step h = 1e-6. Its truncation error
// is O(h^2 f”') ~ 1e-12 and its rounding error ~ eps*|f|/h ~ 1e-10 for
// losses of order 1, so agreement to 1e-6 (absolute or relative, whichever
// is looser) leaves a wide margin yet catches any wrong derivative.
func checkGradients(t *testing.T, xData *tensor.Dense, build func(s *Scope, x *G.Node) ([]*G.Node, error)) {
	t.Helper()
	g := G.NewGraph()
	s := NewScope(g)
	x := input(g, "x", xData)
	outs, err := build(s, x)
	if err != nil {
		t.Fatal(err)
	}
	loss := testLoss(t, g, outs)
	wrt := append(s.Nodes(), x)
	if _, err := G.Grad(loss, wrt...); err != nil {
		t.Fatal(err)
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	run := func() float64 {
		m.Reset()
		if err := m.RunAll(); err != nil {
			t.Fatal(err)
		}
		return loss.Value().Data().(float64)
	}
	// Running the graph must not write into its inputs or parameters
	// (see the reshape quirk in conv.go): snapshot, run twice, compare.
	before := [][]float64{append([]float64(nil), xData.Data().([]float64)...)}
	for _, p := range s.Params() {
		before = append(before, append([]float64(nil), p.Value.Data().([]float64)...))
	}
	run()
	run()
	after := [][]float64{xData.Data().([]float64)}
	for _, p := range s.Params() {
		after = append(after, p.Value.Data().([]float64))
	}
	for i := range before {
		if !floats.Equal(before[i], after[i]) {
			t.Fatalf("running forward and backward changed input/parameter %d", i)
		}
	}
	var symbolic [][]float64
	for _, n := range wrt {
		gv, err := n.Grad()
		if err != nil {
			t.Fatalf("grad of %s: %v", n.Name(), err)
		}
		symbolic = append(symbolic, append([]float64(nil), gv.Data().([]float64)...))
	}
	values := make([][]float64, len(wrt))
	for i, p := range s.Params() {
		values[i] = p.Value.Data().([]float64)
	}
	values[len(wrt)-1] = xData.Data().([]float64)
	for i, n := range wrt {
		data := values[i]
		orig := append([]float64(nil), data...)
		f := func(v []float64) float64 {
			copy(data, v)
			return run()
		}
		numeric := fd.Gradient(nil, f, orig, &fd.Settings{Formula: fd.Central, Step: 1e-6})
		copy(data, orig)
		if floats.Norm(numeric, math.Inf(1)) == 0 {
			t.Errorf("%s: finite-difference gradient is all zero; the check would be vacuous", n.Name())
		}
		// floats.EqualApprox: within tol absolute or relative, elementwise.
		if !floats.EqualApprox(symbolic[i], numeric, 1e-6) {
			t.Errorf("%s: gradient\n symbolic %v\n fd       %v", n.Name(), symbolic[i], numeric)
		}
	}
}

// forward builds the graph of build on x, runs it and returns the outputs'
// values as float64 slices (converting float32).
func forward(t *testing.T, x *tensor.Dense, build func(s *Scope, x *G.Node) ([]*G.Node, error)) [][]float64 {
	t.Helper()
	g := G.NewGraph()
	s := NewScope(g)
	xn := input(g, "x", x)
	outs, err := build(s, xn)
	if err != nil {
		t.Fatal(err)
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	if err := m.RunAll(); err != nil {
		t.Fatal(err)
	}
	var res [][]float64
	for _, o := range outs {
		res = append(res, toF64(o.Value().Data()))
	}
	return res
}

func toF64(v any) []float64 {
	switch d := v.(type) {
	case []float64:
		return append([]float64(nil), d...)
	case []float32:
		r := make([]float64, len(d))
		for i, x := range d {
			r[i] = float64(x)
		}
		return r
	case float64:
		return []float64{d}
	case float32:
		return []float64{float64(d)}
	}
	return nil
}

// one wraps a single-output layer into the build signature.
func one(l Layer) func(s *Scope, x *G.Node) ([]*G.Node, error) {
	return func(s *Scope, x *G.Node) ([]*G.Node, error) {
		y, err := l.Forward(s, x)
		return []*G.Node{y}, err
	}
}

// randomizeParams overwrites every parameter (biases included, which start
// at zero) with uniform values in [-scale, scale), so that tests exercise
// non-zero biases.
func randomizeParams(ps []*Param, seed uint64, scale float64) {
	for i, p := range ps {
		r := randTensor(seed+uint64(i)*31, scale, p.Value.Shape()...)
		switch d := p.Value.Data().(type) {
		case []float64:
			copy(d, r.Data().([]float64))
		case []float32:
			for j, v := range r.Data().([]float64) {
				d[j] = float32(v)
			}
		}
	}
}
