package layers

import (
	"fmt"
	"math"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// unfusedDense builds act(x W + b) from gorgonia's own ops, as Dense and MLP
// did before the fused op: Mul, BroadcastAdd, then Activation.Apply
// (gorgonia's Rectify, LeakyRelu, Tanh and Sigmoid, and this package's
// softplus and ELU compositions of gorgonia ops).
func unfusedDense(x, w, b *G.Node, act Activation) (*G.Node, error) {
	xw, err := G.Mul(x, w)
	if err != nil {
		return nil, err
	}
	y, err := G.BroadcastAdd(xw, b, nil, []byte{0})
	if err != nil {
		return nil, err
	}
	return act.Apply(y)
}

// runDense builds act(x W + b) fused or unfused in a new graph, with the
// loss sum(R ⊙ y) + 0.5*sum(y²), runs forward and backward twice (the second
// time on xData2, to exercise the ops' kept buffers) and returns y and the
// gradients with respect to x, W and b after each run, as float64.
func runDense(t *testing.T, fused bool, act Activation, dt tensor.Dtype, xData, xData2, wData, bData *tensor.Dense) [2][4][]float64 {
	t.Helper()
	g := G.NewGraph()
	conv := func(d *tensor.Dense) *tensor.Dense {
		if dt == tensor.Float64 {
			return d.Clone().(*tensor.Dense)
		}
		out := tensor.New(tensor.WithShape(d.Shape().Clone()...), tensor.Of(tensor.Float32))
		for i, v := range d.Data().([]float64) {
			out.Data().([]float32)[i] = float32(v)
		}
		return out
	}
	xT := conv(xData)
	x := input(g, "x", xT)
	d := &Dense{name: "d", in: wData.Shape()[0], out: wData.Shape()[1],
		weight: &Param{Name: "d.weight", Value: conv(wData)}, bias: &Param{Name: "d.bias", Value: conv(bData)}}
	s := NewScope(g)
	w, b := s.Bind(d.weight), s.Bind(d.bias)
	var y *G.Node
	var err error
	if fused {
		y, err = d.forward("test", s, x, act)
	} else {
		y, err = unfusedDense(x, w, b, act)
	}
	if err != nil {
		t.Fatal(err)
	}
	r := randTensor(77, 1, y.Shape()...)
	rN := input(g, "R", conv(r))
	half := G.NewConstant(0.5)
	if dt == tensor.Float32 {
		half = G.NewConstant(float32(0.5))
	}
	loss := G.Must(G.Add(G.Must(G.Sum(G.Must(G.HadamardProd(rN, y)))),
		G.Must(G.Mul(G.Must(G.Sum(G.Must(G.Square(y)))), half))))
	grads, err := G.Grad(loss, x, w, b)
	if err != nil {
		t.Fatal(err)
	}
	// Read each value as it is computed: by the end of a run gorgonia may
	// have reused an intermediate node's memory for a later result.
	var slots [4]G.Value
	for j, n := range append(G.Nodes{y}, grads...) {
		G.Read(n, &slots[j])
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	var res [2][4][]float64
	for run, xd := range []*tensor.Dense{xData, xData2} {
		setData(xT, xd.Data().([]float64))
		m.Reset()
		if err := m.RunAll(); err != nil {
			t.Fatal(err)
		}
		for j, v := range slots {
			res[run][j] = toF64(v.Data())
		}
	}
	return res
}

// setData copies src into the float32 or float64 tensor dst.
func setData(dst *tensor.Dense, src []float64) {
	switch d := dst.Data().(type) {
	case []float64:
		copy(d, src)
	case []float32:
		for i, v := range src {
			d[i] = float32(v)
		}
	}
}

// TestFusedDenseMatchesUnfused checks the fused Dense op, forward and
// backward, against the same layer built from gorgonia's own ops (matrix
// product, broadcast add, and the activation ops), for every activation,
// in float64 and float32, on two runs of one graph (the fused ops reuse
// their output tensors). The finite-difference checks of the fused op are
// TestDenseGradient and TestMLPGradientEachActivation (gonum diff/fd).
//
// Tolerances: float64 1e-12 relative (floor 1e-12): the two graphs sum the
// same products in different orders (bias first, or after the product) and
// gorgonia's float64 tanh and sigmoid are the standard library's. float32
// 2e-5 relative (floor 2e-5): the fused op's tanh, sigmoid and softplus are
// internal/vecmath's (0.51 ulp) where gorgonia's are chewxy/math32's, and
// sums of 7 terms of order 1 round at ~1e-7 each.
func TestFusedDenseMatchesUnfused(t *testing.T) {
	const n, in, out = 5, 7, 6
	x1 := randTensor(1, 2, n, in)
	x2 := randTensor(2, 2, n, in)
	wd := randTensor(3, 0.8, in, out)
	bd := randTensor(4, 0.5, 1, out)
	names := []string{"y", "dx", "dW", "db"}
	for _, act := range []Activation{Identity, ReLU, LeakyReLU, Tanh, Sigmoid, Softplus, ELU} {
		for _, dt := range []tensor.Dtype{tensor.Float64, tensor.Float32} {
			t.Run(fmt.Sprintf("%s/%v", act, dt), func(t *testing.T) {
				tol := 1e-12
				if dt == tensor.Float32 {
					tol = 2e-5
				}
				got := runDense(t, true, act, dt, x1, x2, wd, bd)
				want := runDense(t, false, act, dt, x1, x2, wd, bd)
				for run := range got {
					for k := range got[run] {
						g, w := got[run][k], want[run][k]
						if len(g) != len(w) {
							t.Fatalf("run %d %s: %d values, want %d", run, names[k], len(g), len(w))
						}
						for i := range g {
							if d := math.Abs(g[i] - w[i]); !(d <= tol*math.Max(1, math.Abs(w[i]))) {
								t.Errorf("run %d %s[%d] = %v, unfused %v", run, names[k], i, g[i], w[i])
							}
						}
					}
				}
			})
		}
	}
}

// TestFusedReLUAtZero checks the rectifier's derivative where the
// pre-activation is exactly 0: the fused op must give 1 there, as
// gorgonia's Rectify (x*(x >= 0)) does and as the ReLU documentation
// states. A zero input row and a zero bias make every pre-activation of
// that row +0; one entry of the bias at -0.25 makes a negative one, whose
// derivative is 0.
func TestFusedReLUAtZero(t *testing.T) {
	x := randTensor(5, 1, 3, 4)
	xs := x.Data().([]float64)
	for j := 4; j < 8; j++ {
		xs[j] = 0 // row 1
	}
	w := randTensor(6, 1, 4, 3)
	b := tensor.New(tensor.WithShape(1, 3), tensor.WithBacking([]float64{0, -0.25, 0}))
	for _, dt := range []tensor.Dtype{tensor.Float64, tensor.Float32} {
		got := runDense(t, true, ReLU, dt, x, x, w, b)
		want := runDense(t, false, ReLU, dt, x, x, w, b)
		// dL/db sums g*relu'(pre) over the rows; row 1 adds g there only
		// if the derivative at 0 is 1, as in the unfused graph.
		for i := range want[0][3] {
			if math.Abs(got[0][3][i]-want[0][3][i]) > 1e-5*math.Max(1, math.Abs(want[0][3][i])) {
				t.Errorf("%v: db[%d] = %v, unfused %v", dt, i, got[0][3][i], want[0][3][i])
			}
		}
		// Row 1 of y: +0 where the pre-activation is +0 (columns 0 and
		// 2), -0 where it is -0.25 (column 1): the sign the backward pass
		// reads.
		for i := 3; i < 6; i++ {
			y := got[0][0][i]
			if wantNeg := i == 4; y != 0 || math.Signbit(y) != wantNeg {
				t.Errorf("%v: y[1][%d] = %v, want a zero with sign bit %t", dt, i-3, y, wantNeg)
			}
		}
	}
}
