package layers

import (
	"encoding/json"
	"errors"
	"math"
	"slices"
	"testing"

	"gonum.org/v1/gonum/floats"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// builtins returns one of every built-in layer, in the given dtype, with
// input shapes (batch 3) to run them on.
func builtins(t *testing.T, opt Options) (map[string]Layer, map[string][]int) {
	t.Helper()
	must := func(l Layer, err error) Layer {
		t.Helper()
		if err != nil {
			t.Fatal(err)
		}
		return l
	}
	dense := must(NewDense("fc", 6, 4, opt))
	mlp := must(NewMLP("mlp", MLPConfig{Sizes: []int{6, 5, 4, 3}, Activation: Tanh, Output: Sigmoid}, opt))
	conv := must(NewConv2D("conv", Conv2DConfig{In: 2, Out: 3, Kernel: [2]int{3, 2}, Stride: [2]int{1, 2}, Padding: [2]int{1, 0}, Activation: LeakyReLU}, opt))
	up := must(NewUpsample("up", 2))
	rs := must(NewReshape("rs", 2, 3, 1))
	fc2 := must(NewDense("dec.fc", 6, 2*3*1, opt))
	upc := must(NewConv2D("dec.conv", Conv2DConfig{In: 2, Out: 1, Kernel: [2]int{3, 3}, Padding: [2]int{1, 1}, Activation: ELU}, opt))
	inner := must(NewSequential("dec.inner", up, upc))
	dec := must(NewSequential("dec", fc2, Softplus, rs, inner, NewFlatten("flat")))
	ls := map[string]Layer{
		"dense": dense, "mlp": mlp, "conv": conv, "upsample": up, "reshape": rs,
		"flatten": NewFlatten("f"), "activation": ELU, "sequential": dec,
	}
	shapes := map[string][]int{
		"dense": {3, 6}, "mlp": {3, 6}, "conv": {3, 2, 5, 4}, "upsample": {3, 2, 2, 3}, "reshape": {3, 6},
		"flatten": {3, 2, 2, 3}, "activation": {3, 6}, "sequential": {3, 6},
	}
	return ls, shapes
}

func TestFromSpecRoundTrip(t *testing.T) {
	ls, _ := builtins(t, Options{Dtype: tensor.Float64, Seed: 1})
	for name, l := range ls {
		t.Run(name, func(t *testing.T) {
			spec := l.(Describer).Spec()
			// Through JSON, as in checkpoint metadata.
			b, err := json.Marshal(spec)
			if err != nil {
				t.Fatal(err)
			}
			var back Spec
			if err := json.Unmarshal(b, &back); err != nil {
				t.Fatal(err)
			}
			rebuilt, err := FromSpec(back, Options{Dtype: tensor.Float32, Seed: 99})
			if err != nil {
				t.Fatalf("FromSpec(%s): %v", b, err)
			}
			comparePar(t, l.Params(), rebuilt.Params())
			b2, _ := json.Marshal(rebuilt.(Describer).Spec())
			if string(b) != string(b2) {
				t.Errorf("spec changed on rebuild:\n %s\n %s", b, b2)
			}
		})
	}
	h, err := NewGaussianHead("enc.head", 7, 3, Options{})
	if err != nil {
		t.Fatal(err)
	}
	h2, err := NewGaussianHeadFromSpec(h.Spec(), Options{Dtype: tensor.Float64})
	if err != nil {
		t.Fatal(err)
	}
	comparePar(t, h.Params(), h2.Params())
	if h2.Latent() != 3 || h2.In() != 7 {
		t.Errorf("rebuilt head sizes %d, %d", h2.In(), h2.Latent())
	}
	want := []string{"enc.head.mean.weight", "enc.head.mean.bias", "enc.head.logvar.weight", "enc.head.logvar.bias"}
	for i, p := range h.Params() {
		if p.Name != want[i] {
			t.Errorf("head param %d named %q, want %q", i, p.Name, want[i])
		}
	}
}

func comparePar(t *testing.T, a, b []*Param) {
	t.Helper()
	if len(a) != len(b) {
		t.Fatalf("%d params, rebuilt %d", len(a), len(b))
	}
	for i := range a {
		if a[i].Name != b[i].Name || !a[i].Value.Shape().Eq(b[i].Value.Shape()) {
			t.Errorf("param %d: %s %v, rebuilt %s %v", i, a[i].Name, a[i].Value.Shape(), b[i].Name, b[i].Value.Shape())
		}
	}
}

func TestParamNames(t *testing.T) {
	m, err := NewMLP("enc", MLPConfig{Sizes: []int{4, 3, 2}}, Options{})
	if err != nil {
		t.Fatal(err)
	}
	want := []string{"enc.0.weight", "enc.0.bias", "enc.1.weight", "enc.1.bias"}
	shapes := []tensor.Shape{{4, 3}, {1, 3}, {3, 2}, {1, 2}}
	for i, p := range m.Params() {
		if p.Name != want[i] || !p.Value.Shape().Eq(shapes[i]) {
			t.Errorf("param %d: %s %v, want %s %v", i, p.Name, p.Value.Shape(), want[i], shapes[i])
		}
		if p.Value.Dtype() != tensor.Float32 {
			t.Errorf("zero Options gave dtype %v, want float32", p.Value.Dtype())
		}
	}
	c, _ := NewConv2D("c", Conv2DConfig{In: 2, Out: 5, Kernel: [2]int{3, 4}}, Options{})
	if s := c.Params()[0].Value.Shape(); !s.Eq(tensor.Shape{5, 2, 3, 4}) {
		t.Errorf("conv weight shape %v", s)
	}
}

// TestFloat32PathEveryLayer runs every layer forward and backward in
// float32 and compares with the same layer in float64 (weights copied).
// float32 keeps ~7 significant digits; a 1e-4 tolerance covers rounding in
// the few sums of these small layers.
func TestFloat32PathEveryLayer(t *testing.T) {
	l64, shapes := builtins(t, Options{Dtype: tensor.Float64, Seed: 4})
	l32, _ := builtins(t, Options{Dtype: tensor.Float32, Seed: 4})
	for name := range l64 {
		t.Run(name, func(t *testing.T) {
			p64, p32 := l64[name].Params(), l32[name].Params()
			randomizeParams(p64, 17, 0.8)
			for i := range p64 {
				d := p32[i].Value.Data().([]float32)
				for j, v := range p64[i].Value.Data().([]float64) {
					d[j] = float32(v)
				}
			}
			x64 := randTensor(5, 1, shapes[name]...)
			x32 := tensor.New(tensor.WithShape(shapes[name]...), tensor.WithBacking(make([]float32, x64.Size())))
			for j, v := range x64.Data().([]float64) {
				x32.Data().([]float32)[j] = float32(v)
			}
			o64, g64 := forwardBackward(t, l64[name], x64)
			o32, g32 := forwardBackward(t, l32[name], x32)
			if !floats.EqualApprox(o64, o32, 1e-4) {
				t.Errorf("outputs differ\n f64 %v\n f32 %v", o64, o32)
			}
			for i := range g64 {
				if !floats.EqualApprox(g64[i], g32[i], 1e-4) {
					t.Errorf("gradient %d differs\n f64 %v\n f32 %v", i, g64[i], g32[i])
				}
			}
		})
	}
	// The head and the sampler in float32.
	h, err := NewGaussianHead("h", 4, 3, Options{Seed: 2})
	if err != nil {
		t.Fatal(err)
	}
	g := G.NewGraph()
	s := NewScope(g)
	x := G.NewMatrix(g, tensor.Float32, G.WithShape(5, 4), G.WithInit(G.Gaussian(0, 1)))
	mu, lv, err := h.Forward(s, x)
	if err != nil {
		t.Fatal(err)
	}
	eps := G.NewMatrix(g, tensor.Float32, G.WithShape(10, 3), G.WithInit(G.Gaussian(0, 1)))
	z, err := Reparameterize(mu, lv, eps)
	if err != nil {
		t.Fatal(err)
	}
	loss := G.Must(G.Sum(G.Must(G.Square(z))))
	if _, err := G.Grad(loss, s.Nodes()...); err != nil {
		t.Fatal(err)
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	if err := m.RunAll(); err != nil {
		t.Fatal(err)
	}
	for _, n := range s.Nodes() {
		gv, err := n.Grad()
		if err != nil {
			t.Fatal(err)
		}
		for _, v := range gv.Data().([]float32) {
			if math.IsNaN(float64(v)) || math.IsInf(float64(v), 0) {
				t.Fatalf("float32 head gradient of %s not finite", n.Name())
			}
		}
	}
}

// forwardBackward runs l on x with loss sum(out^2)/2 and returns the output
// and the gradients of the parameters, as float64.
func forwardBackward(t *testing.T, l Layer, x *tensor.Dense) ([]float64, [][]float64) {
	t.Helper()
	g := G.NewGraph()
	s := NewScope(g)
	y, err := l.Forward(s, input(g, "x", x))
	if err != nil {
		t.Fatal(err)
	}
	loss := G.Must(G.Sum(G.Must(G.Square(y))))
	var grads [][]float64
	if nodes := s.Nodes(); len(nodes) > 0 {
		if _, err := G.Grad(loss, nodes...); err != nil {
			t.Fatal(err)
		}
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	if err := m.RunAll(); err != nil {
		t.Fatal(err)
	}
	for _, n := range s.Nodes() {
		gv, err := n.Grad()
		if err != nil {
			t.Fatal(err)
		}
		grads = append(grads, toF64(gv.Data()))
	}
	return toF64(y.Value().Data()), grads
}

// ParamShapes predicts, from the Spec alone, exactly the names and shapes
// (in order) of the parameters that the layer itself has, for every
// built-in kind, nested sequentials and the head included.
func TestParamShapesMatchesParams(t *testing.T) {
	opt := Options{Seed: 1}
	ls, _ := builtins(t, opt)
	head, err := NewGaussianHead("head", 5, 3, opt)
	if err != nil {
		t.Fatal(err)
	}
	all := map[string]Describer{"head": head}
	for name, l := range ls {
		all[name] = l.(Describer)
	}
	for name, d := range all {
		got, err := ParamShapes(d.Spec())
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		var ps []*Param
		if pl, ok := d.(interface{ Params() []*Param }); ok {
			ps = pl.Params()
		}
		if len(got) != len(ps) {
			t.Fatalf("%s: %d shapes, the layer has %d parameters", name, len(got), len(ps))
		}
		for i, p := range ps {
			if got[i].Name != p.Name || !slices.Equal(got[i].Shape, []int(p.Value.Shape())) {
				t.Errorf("%s: shape %d is %s %v, parameter %s %v", name, i, got[i].Name, got[i].Shape, p.Name, p.Value.Shape())
			}
		}
	}
	// Unknown kinds, in a sequential too, and malformed configs fail.
	for name, spec := range map[string]Spec{
		"unknown":       {Kind: "mystery", Config: []byte(`{}`)},
		"empty kind":    {Kind: "", Config: []byte(`{"type":"x"}`)},
		"unknown field": {Kind: kindDense, Config: []byte(`{"name":"d","in":1,"out":2,"bias":false}`)},
		"nested":        {Kind: kindSequential, Config: []byte(`{"name":"s","layers":[{"kind":"mystery","config":{}}]}`)},
	} {
		if _, err := ParamShapes(spec); err == nil {
			t.Errorf("%s: no error", name)
		}
	}
	deep := `{"kind":"flatten","config":{"name":"f"}}`
	for range maxSpecDepth + 1 {
		deep = `{"kind":"sequential","config":{"name":"s","layers":[` + deep + `]}}`
	}
	var spec Spec
	if err := json.Unmarshal([]byte(deep), &spec); err != nil {
		t.Fatal(err)
	}
	if _, err := ParamShapes(spec); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("nesting of %d: %v, want ErrInvalidArgument", maxSpecDepth+1, err)
	}
}
