package losses_test

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// dtypes are the two supported dtypes.
var dtypes = []tensor.Dtype{tensor.Float64, tensor.Float32}

// denseOf returns a tensor of dtype dt and the given shape holding data.
func denseOf(dt tensor.Dtype, shape []int, data []float64) *tensor.Dense {
	if dt == tensor.Float32 {
		d := make([]float32, len(data))
		for i, v := range data {
			d[i] = float32(v)
		}
		return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(d))
	}
	return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(append([]float64(nil), data...)))
}

// input adds a named matrix input with the given value to g.
func input(g *G.ExprGraph, dt tensor.Dtype, name string, rows, cols int, data []float64) *G.Node {
	return G.NewMatrix(g, dt, G.WithShape(rows, cols), G.WithName(name), G.WithValue(denseOf(dt, []int{rows, cols}, data)))
}

// scalarInput adds a named scalar input to g.
func scalarInput(g *G.ExprGraph, dt tensor.Dtype, name string, v float64) *G.Node {
	if dt == tensor.Float32 {
		return G.NewScalar(g, dt, G.WithName(name), G.WithValue(float32(v)))
	}
	return G.NewScalar(g, dt, G.WithName(name), G.WithValue(v))
}

// watch arranges for a copy of n's value to be kept at each run. Reading
// n.Value() after a run is not safe in gorgonia: the tape machine may reuse
// an intermediate node's memory for a later op (in-place), so intermediate
// values must be read through G.Read, which copies.
func watch(n *G.Node) *G.Value {
	v := new(G.Value)
	G.Read(n, v)
	return v
}

// values returns a watched value as float64s (after a run).
func values(t *testing.T, w *G.Value) []float64 {
	t.Helper()
	if *w == nil {
		t.Fatal("value not read: was the graph run?")
	}
	switch v := (*w).Data().(type) {
	case []float64:
		return append([]float64(nil), v...)
	case []float32:
		out := make([]float64, len(v))
		for i, x := range v {
			out[i] = float64(x)
		}
		return out
	case float64:
		return []float64{v}
	case float32:
		return []float64{float64(v)}
	}
	t.Fatalf("unexpected value type %T", (*w).Data())
	return nil
}

// run executes g once.
func run(t *testing.T, g *G.ExprGraph) {
	t.Helper()
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		t.Fatalf("run: %v", err)
	}
}

// randn returns n standard normal draws scaled by s.
func randn(rng *rand.Rand, n int, s float64) []float64 {
	out := make([]float64, n)
	for i := range out {
		out[i] = s * rng.NormFloat64()
	}
	return out
}

// uniform returns n draws uniform on [lo, hi).
func uniform(rng *rand.Rand, n int, lo, hi float64) []float64 {
	out := make([]float64, n)
	for i := range out {
		out[i] = lo + (hi-lo)*rng.Float64()
	}
	return out
}

// close reports |got - want| <= tol * max(|want|, floor).
func closeTo(got, want, tol, floor float64) bool {
	if math.IsInf(want, 0) {
		return got == want
	}
	return math.Abs(got-want) <= tol*math.Max(math.Abs(want), floor)
}

// checkAll compares got and want elementwise.
func checkAll(t *testing.T, what string, got, want []float64, tol, floor float64) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%s: have %d values, want %d", what, len(got), len(want))
	}
	for i := range got {
		if !closeTo(got[i], want[i], tol, floor) {
			t.Errorf("%s[%d] = %.17g, want %.17g (tol %g)", what, i, got[i], want[i], tol)
		}
	}
}

// arg is one input of a gradient check: a matrix (cols > 0) or a scalar
// (rows = cols = 0).
type arg struct {
	name       string
	rows, cols int
	data       []float64
}

// gradCheck builds out = build(inputs) in float64, forms the scalar
// sum(out .* w) for fixed random weights w, and checks both out against
// ref(inputs) and the gradient with respect to every input against
// gonum diff/fd central differences of the same scalar computed from ref.
// Tolerance: 1e-9 relative on values; 1e-6 relative (floor 1) on gradients:
// the central difference with step 1e-5 has truncation error about
// 1e-10 * |f”'| and rounding error about 1e-11 * |f| here, far below that.
func gradCheck(t *testing.T, name string, args []arg, build func(in []*G.Node) (*G.Node, error), ref func(in [][]float64) []float64) {
	t.Helper()
	gradCheckWRT(t, name, args, func(in []*G.Node) (*G.Node, []*G.Node, error) {
		out, err := build(in)
		return out, in, err
	}, ref)
}

// gradCheckWRT is gradCheck where build also returns the nodes to
// differentiate with respect to, one per arg (a parameter node bound by a
// Scope in place of the arg's input node, say).
func gradCheckWRT(t *testing.T, name string, args []arg, build func(in []*G.Node) (*G.Node, []*G.Node, error), ref func(in [][]float64) []float64) {
	t.Helper()
	g := G.NewGraph()
	nodes := make([]*G.Node, len(args))
	var flat []float64
	for i, a := range args {
		if a.cols == 0 {
			nodes[i] = scalarInput(g, tensor.Float64, a.name, a.data[0])
		} else {
			nodes[i] = input(g, tensor.Float64, a.name, a.rows, a.cols, a.data)
		}
		flat = append(flat, a.data...)
	}
	out, wrt, err := build(nodes)
	if err != nil {
		t.Fatalf("%s: build: %v", name, err)
	}
	rng := rand.New(rand.NewPCG(7, 11))
	size := out.Shape().TotalSize()
	w := uniform(rng, size, 0.5, 1.5)
	var wNode *G.Node
	if out.IsScalar() {
		wNode = G.NewScalar(g, tensor.Float64, G.WithName("w"), G.WithValue(w[0]))
	} else {
		wNode = G.NewTensor(g, tensor.Float64, out.Shape().Dims(), G.WithShape(out.Shape().Clone()...), G.WithName("w"),
			G.WithValue(denseOf(tensor.Float64, out.Shape().Clone(), w)))
	}
	prod, err := G.HadamardProd(out, wNode)
	if err != nil {
		t.Fatalf("%s: weights: %v", name, err)
	}
	cost, err := G.Sum(prod)
	if err != nil {
		t.Fatalf("%s: sum: %v", name, err)
	}
	grads, err := G.Grad(cost, wrt...)
	if err != nil {
		t.Fatalf("%s: grad: %v", name, err)
	}
	outW := watch(out)
	gradW := make([]*G.Value, len(grads))
	for i, gn := range grads {
		gradW[i] = watch(gn)
	}
	run(t, g)

	split := func(x []float64) [][]float64 {
		parts := make([][]float64, len(args))
		off := 0
		for i, a := range args {
			parts[i] = x[off : off+len(a.data)]
			off += len(a.data)
		}
		return parts
	}
	// reference: the plain Go function ref
	checkAll(t, name+" value", values(t, outW), ref(split(flat)), 1e-9, 1e-12)

	f := func(x []float64) float64 {
		r := ref(split(x))
		s := 0.0
		for i, v := range r {
			s += w[i] * v
		}
		return s
	}
	// reference: gonum diff/fd Gradient, central differences
	want := fd.Gradient(nil, f, flat, &fd.Settings{Formula: fd.Central, Step: 1e-5})
	var got []float64
	for _, gw := range gradW {
		got = append(got, values(t, gw)...)
	}
	checkAll(t, name+" gradient", got, want, 1e-6, 1)
}
