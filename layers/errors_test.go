package layers

import (
	"errors"
	"strings"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// wantArgErr fails unless err wraps ErrInvalidArgument and its message
// names arg.
func wantArgErr(t *testing.T, what string, err error, arg string) {
	t.Helper()
	if err == nil {
		t.Errorf("%s: no error", what)
		return
	}
	if !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("%s: %v does not wrap ErrInvalidArgument", what, err)
	}
	if !strings.Contains(err.Error(), arg) {
		t.Errorf("%s: %q does not name %q", what, err, arg)
	}
}

func TestConstructorsRejectBadArguments(t *testing.T) {
	_, err := NewDense("d", 0, 3, Options{})
	wantArgErr(t, "dense in=0", err, "in")
	_, err = NewDense("d", 3, -1, Options{})
	wantArgErr(t, "dense out=-1", err, "out")
	_, err = NewDense("", 3, 3, Options{})
	wantArgErr(t, "dense empty name", err, "name")
	_, err = NewDense("d", 3, 3, Options{Dtype: tensor.Int}) // wrong dtype
	wantArgErr(t, "dense int dtype", err, "opt.Dtype")
	_, err = NewDense("d", 3, 3, Options{Init: Init(99)})
	wantArgErr(t, "dense unknown init", err, "opt.Init")
	_, err = NewMLP("m", MLPConfig{Sizes: []int{3}}, Options{})
	wantArgErr(t, "mlp one size", err, "cfg.Sizes")
	_, err = NewMLP("m", MLPConfig{Sizes: []int{3, 0, 2}}, Options{})
	wantArgErr(t, "mlp zero hidden", err, "cfg.Sizes[1]")
	_, err = NewMLP("m", MLPConfig{Sizes: []int{3, 2}, Activation: "swish"}, Options{})
	wantArgErr(t, "mlp unknown activation", err, "cfg.Activation")
	_, err = NewMLP("m", MLPConfig{Sizes: []int{3, 2}, Output: "RELU"}, Options{})
	wantArgErr(t, "mlp unknown output", err, "cfg.Output")
	_, err = NewConv2D("c", Conv2DConfig{In: 1, Out: 1}, Options{})
	wantArgErr(t, "conv zero kernel", err, "cfg.Kernel")
	_, err = NewConv2D("c", Conv2DConfig{In: 0, Out: 1, Kernel: [2]int{3, 3}}, Options{})
	wantArgErr(t, "conv in=0", err, "cfg.In")
	_, err = NewConv2D("c", Conv2DConfig{In: 1, Out: 1, Kernel: [2]int{3, 3}, Stride: [2]int{0, 2}}, Options{})
	wantArgErr(t, "conv stride 0", err, "cfg.Stride")
	_, err = NewConv2D("c", Conv2DConfig{In: 1, Out: 1, Kernel: [2]int{3, 3}, Padding: [2]int{-1, 0}}, Options{})
	wantArgErr(t, "conv padding", err, "cfg.Padding")
	_, err = NewUpsample("u", 0)
	wantArgErr(t, "upsample 0", err, "factor")
	_, err = NewReshape("r")
	wantArgErr(t, "reshape empty", err, "shape")
	_, err = NewReshape("r", 2, 0)
	wantArgErr(t, "reshape zero", err, "shape[1]")
	_, err = NewGaussianHead("h", 4, 0, Options{})
	wantArgErr(t, "head latent 0", err, "latent")
	_, err = NewGaussianHead("h", 0, 2, Options{})
	wantArgErr(t, "head in 0", err, "in")
	_, err = NewSequential("s")
	wantArgErr(t, "sequential empty", err, "layers")
	_, err = NewSequential("s", ReLU, nil)
	wantArgErr(t, "sequential nil layer", err, "layers[1]")
	d, _ := NewDense("same", 2, 2, Options{})
	d2, _ := NewDense("same", 2, 2, Options{})
	_, err = NewSequential("s", d, d2)
	wantArgErr(t, "sequential duplicate names", err, "layers[1]")
}

func TestForwardRejectsBadInput(t *testing.T) {
	opt := Options{Dtype: tensor.Float64}
	d, _ := NewDense("enc.fc", 4, 3, opt)
	c, _ := NewConv2D("enc.conv", Conv2DConfig{In: 2, Out: 1, Kernel: [2]int{3, 3}}, opt)
	h, _ := NewGaussianHead("enc.head", 3, 2, opt)
	r, _ := NewReshape("dec.reshape", 2, 2)
	u, _ := NewUpsample("dec.up", 2)
	g := G.NewGraph()
	s := NewScope(g)
	x64 := G.NewMatrix(g, tensor.Float64, G.WithShape(5, 4), G.WithName("x64"))
	x32 := G.NewMatrix(g, tensor.Float32, G.WithShape(5, 4), G.WithName("x32"))
	x5 := G.NewMatrix(g, tensor.Float64, G.WithShape(5, 5), G.WithName("x5"))
	img := G.NewTensor(g, tensor.Float64, 4, G.WithShape(1, 2, 2, 5), G.WithName("img"))
	img3 := G.NewTensor(g, tensor.Float64, 4, G.WithShape(1, 3, 5, 5), G.WithName("img3"))
	other := G.NewMatrix(G.NewGraph(), tensor.Float64, G.WithShape(5, 4), G.WithName("other"))

	_, err := d.Forward(s, nil)
	wantArgErr(t, "dense nil x", err, "x")
	_, err = d.Forward(nil, x64)
	wantArgErr(t, "dense nil scope", err, "s")
	_, err = d.Forward(s, x32)
	wantArgErr(t, "dense float32 x into float64 layer", err, "dtype")
	_, err = d.Forward(s, x5)
	wantArgErr(t, "dense wrong width", err, "enc.fc")
	_, err = d.Forward(s, other)
	wantArgErr(t, "dense x of another graph", err, "x")
	_, err = c.Forward(s, x64)
	wantArgErr(t, "conv 2-D input", err, "enc.conv")
	_, err = c.Forward(s, img)
	wantArgErr(t, "conv input smaller than kernel", err, "x")
	_, err = c.Forward(s, img3)
	wantArgErr(t, "conv wrong channels", err, "x")
	_, _, err = h.Forward(s, x64)
	wantArgErr(t, "head wrong width", err, "enc.head")
	_, _, err = h.Forward(s, nil)
	wantArgErr(t, "head nil", err, "x")
	_, err = r.Forward(s, x5)
	wantArgErr(t, "reshape wrong size", err, "dec.reshape")
	_, err = u.Forward(s, x64)
	wantArgErr(t, "upsample 2-D", err, "x")
	_, err = NewFlatten("f").Forward(s, nil)
	wantArgErr(t, "flatten nil", err, "x")
	_, err = Activation("gelu").Apply(x64)
	wantArgErr(t, "unknown activation", err, "gelu")
	_, err = ReLU.Apply(nil)
	wantArgErr(t, "activation nil", err, "x")
	_, err = SoftClamp(x64, 1, 1)
	wantArgErr(t, "soft clamp empty interval", err, "lo")
	m, _ := NewMLP("m", MLPConfig{Sizes: []int{4, 3, 2}}, opt)
	seq, _ := NewSequential("seq", m, ReLU)
	_, err = seq.Forward(s, x5)
	wantArgErr(t, "sequential passes the inner error", err, "m.0")
}

func TestReparameterizeRejectsBadInput(t *testing.T) {
	g := G.NewGraph()
	mu := G.NewMatrix(g, tensor.Float64, G.WithShape(3, 2), G.WithName("mu"))
	lv := G.NewMatrix(g, tensor.Float64, G.WithShape(3, 2), G.WithName("lv"))
	lv32 := G.NewMatrix(g, tensor.Float32, G.WithShape(3, 2), G.WithName("lv32"))
	lvWide := G.NewMatrix(g, tensor.Float64, G.WithShape(3, 3), G.WithName("lvw"))
	eps := func(r, c int) *G.Node {
		return G.NewMatrix(g, tensor.Float64, G.WithShape(r, c))
	}
	eps32 := G.NewMatrix(g, tensor.Float32, G.WithShape(3, 2))
	vec := G.NewVector(g, tensor.Float64, G.WithShape(2))
	empty := G.NewMatrix(g, tensor.Float64, G.WithShape(3, 0), G.WithName("mu0"))

	_, err := Reparameterize(nil, lv, eps(3, 2))
	wantArgErr(t, "nil mu", err, "mu")
	_, err = Reparameterize(mu, lv, nil)
	wantArgErr(t, "nil eps", err, "eps")
	_, err = Reparameterize(mu, lvWide, eps(3, 2))
	wantArgErr(t, "logVar shape", err, "logVar")
	_, err = Reparameterize(vec, vec, vec)
	wantArgErr(t, "mu not a matrix", err, "mu")
	_, err = Reparameterize(empty, empty, eps(3, 0))
	wantArgErr(t, "latent size 0", err, "mu")
	_, err = Reparameterize(mu, lv, eps(7, 2)) // 7 rows: not K*3
	wantArgErr(t, "eps rows not a multiple", err, "eps")
	_, err = Reparameterize(mu, lv, eps(0, 2)) // K = 0
	wantArgErr(t, "K = 0", err, "eps")
	_, err = Reparameterize(mu, lv, eps(6, 3))
	wantArgErr(t, "eps width", err, "eps")
	_, err = Reparameterize(mu, lv32, eps(3, 2))
	wantArgErr(t, "dtype mismatch logVar", err, "dtypes")
	_, err = Reparameterize(mu, lv, eps32)
	wantArgErr(t, "dtype mismatch eps", err, "dtypes")
	if err := FillNormal(nil, tensor.New(tensor.Of(tensor.Float64), tensor.WithShape(2))); err == nil || !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("FillNormal(nil rng): %v", err)
	}
}

func TestFromSpecRejectsUnknownKind(t *testing.T) {
	_, err := FromSpec(Spec{Kind: "attention", Config: []byte(`{}`)}, Options{})
	if !errors.Is(err, ErrUnknownKind) {
		t.Errorf("unknown kind: %v", err)
	}
	inner := Spec{Kind: "sequential", Config: []byte(`{"name":"s","layers":[{"kind":"relu??","config":{}}]}`)}
	if _, err := FromSpec(inner, Options{}); !errors.Is(err, ErrUnknownKind) {
		t.Errorf("unknown nested kind: %v", err)
	}
	_, err = FromSpec(Spec{Kind: "dense", Config: []byte(`{"name":"d","in":3,"outt":2}`)}, Options{})
	wantArgErr(t, "misspelt config key", err, "spec.Config")
	_, err = FromSpec(Spec{Kind: "dense", Config: []byte(`{"name":"d","in":3,"out":0}`)}, Options{})
	wantArgErr(t, "invalid config", err, "out")
	if _, err := NewGaussianHeadFromSpec(Spec{Kind: "dense"}, Options{}); !errors.Is(err, ErrUnknownKind) {
		t.Errorf("head from dense spec: %v", err)
	}
}
