package layers

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/floats/scalar"
	"gonum.org/v1/gonum/mat"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

func TestDenseForwardMatchesGonumMat(t *testing.T) {
	d, err := NewDense("d", 4, 3, f64)
	if err != nil {
		t.Fatal(err)
	}
	randomizeParams(d.Params(), 61, 1)
	x := randTensor(9, 2, 5, 4)
	got := forward(t, x, one(d))[0]

	// reference: gonum mat, Y = X W + 1 b computed directly.
	X := mat.NewDense(5, 4, x.Data().([]float64))
	W := mat.NewDense(4, 3, d.Weight().Value.Data().([]float64))
	b := d.Bias().Value.Data().([]float64)
	var Y mat.Dense
	Y.Mul(X, W)
	for i := 0; i < 5; i++ {
		for j := 0; j < 3; j++ {
			Y.Set(i, j, Y.At(i, j)+b[j])
		}
	}
	if !floats.EqualApprox(got, Y.RawMatrix().Data, 1e-12) {
		t.Errorf("Dense forward\n got  %v\n want %v", got, Y.RawMatrix().Data)
	}
}

// naiveConv is the definition of the cross-correlation used as
// "convolution" in deep learning (common practice; e.g. Goodfellow, Bengio
// and Courville 2016, Deep Learning, eq. 9.6, from memory):
//
//	y[n,o,i,j] = b[o] + sum_{c,u,v} x[n,c,i*sh+u-ph, j*sw+v-pw] * w[o,c,u,v]
//
// with x zero outside its bounds.
func naiveConv(x, w []float64, b []float64, n, c, h, wd, o, kh, kw, sh, sw, ph, pw int) ([]float64, int, int) {
	oh := (h+2*ph-kh)/sh + 1
	ow := (wd+2*pw-kw)/sw + 1
	y := make([]float64, n*o*oh*ow)
	for ni := 0; ni < n; ni++ {
		for oi := 0; oi < o; oi++ {
			for i := 0; i < oh; i++ {
				for j := 0; j < ow; j++ {
					sum := b[oi]
					for ci := 0; ci < c; ci++ {
						for u := 0; u < kh; u++ {
							for v := 0; v < kw; v++ {
								r, q := i*sh+u-ph, j*sw+v-pw
								if r < 0 || r >= h || q < 0 || q >= wd {
									continue
								}
								sum += x[((ni*c+ci)*h+r)*wd+q] * w[((oi*c+ci)*kh+u)*kw+v]
							}
						}
					}
					y[((ni*o+oi)*oh+i)*ow+j] = sum
				}
			}
		}
	}
	return y, oh, ow
}

func TestConv2DForwardMatchesNaiveLoop(t *testing.T) {
	cases := []Conv2DConfig{
		{In: 3, Out: 2, Kernel: [2]int{3, 3}},
		{In: 2, Out: 4, Kernel: [2]int{2, 3}, Stride: [2]int{2, 1}, Padding: [2]int{1, 2}},
		{In: 1, Out: 3, Kernel: [2]int{4, 4}, Stride: [2]int{2, 2}, Padding: [2]int{1, 1}},
	}
	for k, cfg := range cases {
		c, err := NewConv2D("c", cfg, f64)
		if err != nil {
			t.Fatal(err)
		}
		randomizeParams(c.Params(), uint64(70+k), 1)
		const n, h, w = 2, 7, 6
		x := randTensor(uint64(10+k), 1, n, cfg.In, h, w)
		// Flatten after the convolution also checks that the (transposed)
		// convolution output is laid out NCHW when reshaped.
		seq, err := NewSequential("s", c, NewFlatten("f"))
		if err != nil {
			t.Fatal(err)
		}
		got := forward(t, x, one(seq))[0]
		want, oh, ow := naiveConv(x.Data().([]float64), c.Params()[0].Value.Data().([]float64), c.Params()[1].Value.Data().([]float64),
			n, cfg.In, h, w, cfg.Out, cfg.Kernel[0], cfg.Kernel[1], c.Config().Stride[0], c.Config().Stride[1], cfg.Padding[0], cfg.Padding[1])
		if gh, gw, _ := c.OutputSize(h, w); gh != oh || gw != ow {
			t.Errorf("case %d: OutputSize %dx%d, want %dx%d", k, gh, gw, oh, ow)
		}
		if !floats.EqualApprox(got, want, 1e-12) {
			t.Errorf("case %d: conv forward\n got  %v\n want %v", k, got, want)
		}
	}
}

func TestUpsampleForward(t *testing.T) {
	u, err := NewUpsample("u", 3)
	if err != nil {
		t.Fatal(err)
	}
	x := randTensor(12, 1, 2, 2, 2, 3)
	got := forward(t, x, one(u))[0]
	// Reference: nearest-neighbour upsampling by definition,
	// y[n,c,i,j] = x[n,c,i/3,j/3] (integer division).
	xd := x.Data().([]float64)
	var want []float64
	for nc := 0; nc < 4; nc++ {
		for i := 0; i < 6; i++ {
			for j := 0; j < 9; j++ {
				want = append(want, xd[nc*6+(i/3)*3+j/3])
			}
		}
	}
	if !floats.Equal(got, want) {
		t.Errorf("upsample\n got  %v\n want %v", got, want)
	}
}

func TestReshapeForward(t *testing.T) {
	r, err := NewReshape("r", 2, 3, 2)
	if err != nil {
		t.Fatal(err)
	}
	g := G.NewGraph()
	xt := randTensor(1, 1, 4, 12)
	x := input(g, "x", xt)
	y, err := r.Forward(NewScope(g), x)
	if err != nil {
		t.Fatal(err)
	}
	if !y.Shape().Eq(tensor.Shape{4, 2, 3, 2}) {
		t.Fatalf("reshape shape %v, want (4, 2, 3, 2)", y.Shape())
	}
	var yv G.Value
	G.Read(y, &yv)
	m := G.NewTapeMachine(g)
	defer m.Close()
	if err := m.RunAll(); err != nil {
		t.Fatal(err)
	}
	// Values: a row-major reshape keeps the order of each record (common
	// knowledge), so y[n, c, i, j] = X[n, (c*3+i)*2+j], X read with gonum mat.
	X := mat.NewDense(4, 12, append([]float64(nil), xt.Data().([]float64)...))
	yd := yv.(*tensor.Dense)
	for n := range 4 {
		for c := range 2 {
			for i := range 3 {
				for j := range 2 {
					got, err := yd.At(n, c, i, j)
					if err != nil {
						t.Fatal(err)
					}
					if want := X.At(n, (c*3+i)*2+j); got.(float64) != want {
						t.Fatalf("y[%d,%d,%d,%d] = %v, want X[%d,%d] = %v", n, c, i, j, got, n, (c*3+i)*2+j, want)
					}
				}
			}
		}
	}
}

// TestReshapeThenLayersMatchesGonumMat checks what the layers after a
// Reshape see: Reshape (N, 12) -> (N, 2, 3, 2), ELU, a 1x1 convolution
// from 2 channels to 1, Flatten. A 1x1 convolution mixes the channels of
// each pixel, so on the flat input it is the matrix product E M with
// E = ELU(X) and M (12, 6), M[(c*3+i)*2+j, i*2+j] = w[c], plus the bias:
// the reference is that product with gonum mat, ELU by its definition.
// The input has negative values and the ELU right after the reshape may
// run in place, so the test also checks that the caller's input tensor is
// left as it was (a reshape of a leaf must not share the leaf's memory).
func TestReshapeThenLayersMatchesGonumMat(t *testing.T) {
	const n = 5
	r, err := NewReshape("r", 2, 3, 2)
	if err != nil {
		t.Fatal(err)
	}
	c, err := NewConv2D("c", Conv2DConfig{In: 2, Out: 1, Kernel: [2]int{1, 1}}, f64)
	if err != nil {
		t.Fatal(err)
	}
	randomizeParams(c.Params(), 81, 1)
	seq, err := NewSequential("s", r, ELU, c, NewFlatten("f"))
	if err != nil {
		t.Fatal(err)
	}
	xt := randTensor(3, 2, n, 12)
	x0 := append([]float64(nil), xt.Data().([]float64)...)
	got := forward(t, xt, one(seq))[0]
	if !floats.Equal(xt.Data().([]float64), x0) {
		t.Fatal("the forward pass wrote into the input tensor")
	}

	w, b := c.Params()[0].Value.Data().([]float64), c.Params()[1].Value.Data().([]float64)
	E := mat.NewDense(n, 12, nil)
	for i := range n {
		for j := range 12 {
			E.Set(i, j, activationRef(ELU, x0[i*12+j]))
		}
	}
	M := mat.NewDense(12, 6, nil)
	for ch := range 2 {
		for p := range 6 { // pixel p = i*2 + j
			M.Set(ch*6+p, p, w[ch])
		}
	}
	var Y mat.Dense
	Y.Mul(E, M) // reference: gonum mat
	want := make([]float64, 0, n*6)
	for i := range n {
		for p := range 6 {
			want = append(want, Y.At(i, p)+b[0])
		}
	}
	if !floats.EqualApprox(got, want, 1e-12) {
		t.Errorf("reshape, ELU, 1x1 conv, flatten\n got  %v\n want %v", got, want)
	}
}

// activationRef is each activation written from its definition with the
// math package.
func activationRef(a Activation, x float64) float64 {
	switch a {
	case ReLU:
		return math.Max(x, 0)
	case LeakyReLU:
		if x >= 0 {
			return x
		}
		return 0.01 * x // slope from the package documentation
	case Tanh:
		return math.Tanh(x)
	case Sigmoid:
		return 1 / (1 + math.Exp(-x))
	case Softplus:
		return math.Log1p(math.Exp(x)) // exp(x) is finite for x < 709
	case ELU:
		if x >= 0 {
			return x
		}
		return math.Expm1(x) // alpha = 1 (Clevert et al. 2016)
	}
	return x
}

func TestActivationsMatchMathFormulas(t *testing.T) {
	xs := []float64{-40, -17, -5, -1.5, -0.3, 0, 0.2, 1, 3.7, 14.5, 16.5, 17, 25, 40, 300}
	for _, dt := range []tensor.Dtype{tensor.Float64, tensor.Float32} {
		for _, a := range []Activation{ReLU, LeakyReLU, Tanh, Sigmoid, Softplus, ELU, Identity} {
			x := tensor.New(tensor.WithShape(1, len(xs)), tensor.WithBacking(append([]float64(nil), xs...)))
			var xt *tensor.Dense = x
			if dt == tensor.Float32 {
				f := make([]float32, len(xs))
				for i, v := range xs {
					f[i] = float32(v)
				}
				xt = tensor.New(tensor.WithShape(1, len(xs)), tensor.WithBacking(f))
			}
			got := forward(t, xt, one(a))[0]
			for i, v := range xs {
				want := activationRef(a, v)
				// float64: 1e-12 relative, except sigmoid, which gorgonia
				// rounds to exactly 1 above 19 (error < 6e-9). float32:
				// a few units in the last place.
				tol := 1e-12
				if a == Sigmoid {
					tol = 1e-8
				}
				if dt == tensor.Float32 {
					tol = 1e-6
				}
				if !scalar.EqualWithinAbsOrRel(got[i], want, tol, tol) {
					t.Errorf("%v %s(%v) = %v, want %v", dt, a, v, got[i], want)
				}
			}
		}
	}
}

func TestSoftClampMatchesFormula(t *testing.T) {
	xs := []float64{-1000, -60, -31, -30, -18, -5, 0, 0.5, 8, 19, 20, 21, 50, 1000}
	x := tensor.New(tensor.WithShape(1, len(xs)), tensor.WithBacking(append([]float64(nil), xs...)))
	build := func(s *Scope, x *G.Node) ([]*G.Node, error) {
		y, err := SoftClamp(x, LogVarMin, LogVarMax)
		return []*G.Node{y}, err
	}
	got := forward(t, x, build)[0]
	sp := func(v float64) float64 { // softplus from its definition, overflow-safe
		if v > 30 {
			return v + math.Log1p(math.Exp(-v))
		}
		return math.Log1p(math.Exp(v))
	}
	for i, v := range xs {
		want := LogVarMin + sp(v-LogVarMin) - sp(v-LogVarMax)
		if !scalar.EqualWithinAbsOrRel(got[i], want, 1e-12, 1e-12) {
			t.Errorf("SoftClamp(%v) = %v, want %v", v, got[i], want)
		}
		if got[i] < LogVarMin || got[i] > LogVarMax {
			t.Errorf("SoftClamp(%v) = %v outside [%v, %v]", v, got[i], LogVarMin, LogVarMax)
		}
		if v >= -18 && v <= 8 && math.Abs(got[i]-v) > 1e-5 {
			t.Errorf("SoftClamp(%v) = %v: moves a normal-range value by more than 1e-5", v, got[i])
		}
	}
}

func TestSoftClampSlope(t *testing.T) {
	xs := []float64{-40, -18, -10, 0, 3, 8, 25}
	xt := tensor.New(tensor.WithShape(1, len(xs)), tensor.WithBacking(append([]float64(nil), xs...)))
	g := G.NewGraph()
	x := input(g, "x", xt)
	y, err := SoftClamp(x, LogVarMin, LogVarMax)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := G.Grad(G.Must(G.Sum(y)), x); err != nil {
		t.Fatal(err)
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	if err := m.RunAll(); err != nil {
		t.Fatal(err)
	}
	gv, _ := x.Grad()
	got := gv.Data().([]float64)
	logistic := func(v float64) float64 { return 1 / (1 + math.Exp(-v)) }
	for i, v := range xs {
		// d/dx [x + softplus(lo-x) - softplus(x-hi)] = 1 - s(lo-x) - s(x-hi),
		// s the logistic function (softplus' = logistic).
		want := 1 - logistic(LogVarMin-v) - logistic(v-LogVarMax)
		if !scalar.EqualWithinAbsOrRel(got[i], want, 1e-9, 1e-9) {
			t.Errorf("slope at %v: %v, want %v", v, got[i], want)
		}
		if v >= -18 && v <= 8 && math.Abs(got[i]-1) > 1e-5 {
			t.Errorf("slope at %v is %v, not within 1e-5 of 1", v, got[i])
		}
		if got[i] <= 0 {
			t.Errorf("slope at %v is %v, want > 0", v, got[i])
		}
	}
}
