package layers

import (
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

var f64 = Options{Dtype: tensor.Float64, Seed: 1}

func TestDenseGradient(t *testing.T) {
	d, err := NewDense("enc", 3, 4, f64)
	if err != nil {
		t.Fatal(err)
	}
	randomizeParams(d.Params(), 11, 0.8)
	checkGradients(t, randTensor(2, 1, 5, 3), one(d))
	// Batch of one: the bias broadcast must work with N = 1 too.
	checkGradients(t, randTensor(3, 1, 1, 3), one(d))
}

func TestMLPGradientEachActivation(t *testing.T) {
	for _, act := range []Activation{ReLU, LeakyReLU, Tanh, Sigmoid, Softplus, ELU, Identity} {
		t.Run(string(act), func(t *testing.T) {
			m, err := NewMLP("mlp", MLPConfig{Sizes: []int{3, 5, 4, 2}, Activation: act, Output: act}, f64)
			if err != nil {
				t.Fatal(err)
			}
			randomizeParams(m.Params(), 21, 0.9)
			checkGradients(t, randTensor(4, 1.5, 6, 3), one(m))
		})
	}
}

func TestConv2DGradient(t *testing.T) {
	cases := []Conv2DConfig{
		{In: 2, Out: 3, Kernel: [2]int{3, 2}},
		{In: 2, Out: 2, Kernel: [2]int{3, 3}, Stride: [2]int{2, 1}, Padding: [2]int{1, 2}, Activation: Tanh},
	}
	for i, cfg := range cases {
		c, err := NewConv2D("conv", cfg, f64)
		if err != nil {
			t.Fatal(err)
		}
		randomizeParams(c.Params(), uint64(31+i), 0.7)
		checkGradients(t, randTensor(uint64(5+i), 1, 2, 2, 5, 4), one(c))
	}
}

func TestDecoderPathGradient(t *testing.T) {
	// Dense -> Reshape -> Upsample -> Conv2D -> Flatten: the upsampling path
	// of a convolutional decoder, checked end to end.
	d, err := NewDense("dec.fc", 3, 2*2*3, f64)
	if err != nil {
		t.Fatal(err)
	}
	r, err := NewReshape("dec.reshape", 2, 2, 3)
	if err != nil {
		t.Fatal(err)
	}
	u, err := NewUpsample("dec.up", 2)
	if err != nil {
		t.Fatal(err)
	}
	c, err := NewConv2D("dec.conv", Conv2DConfig{In: 2, Out: 1, Kernel: [2]int{3, 3}, Padding: [2]int{1, 1}, Activation: Softplus}, f64)
	if err != nil {
		t.Fatal(err)
	}
	seq, err := NewSequential("dec", d, ReLU, r, u, c, NewFlatten("dec.flat"))
	if err != nil {
		t.Fatal(err)
	}
	randomizeParams(seq.Params(), 41, 0.8)
	checkGradients(t, randTensor(6, 1, 2, 3), one(seq))
}

func TestGaussianHeadGradient(t *testing.T) {
	h, err := NewGaussianHead("head", 4, 3, f64)
	if err != nil {
		t.Fatal(err)
	}
	randomizeParams(h.Params(), 51, 0.9)
	build := func(s *Scope, x *G.Node) ([]*G.Node, error) {
		mu, lv, err := h.Forward(s, x)
		return []*G.Node{mu, lv}, err
	}
	checkGradients(t, randTensor(7, 1, 5, 4), build)
	// Raw log-variances near and beyond the bounds: the smooth bound keeps
	// an exact, non-zero gradient there.
	lb := h.Params()[3].Value.Data().([]float64)
	lb[0], lb[1], lb[2] = -31, 19.5, 24
	checkGradients(t, randTensor(8, 1, 2, 4), build)
}

func TestFlattenOfInputThenActivation(t *testing.T) {
	// Flatten of a leaf followed by an elementwise op: with a bare
	// G.Reshape the TapeMachine would write into the caller's x (see
	// reshape in conv.go); checkGradients fails if x changes.
	d, err := NewDense("fc", 12, 2, f64)
	if err != nil {
		t.Fatal(err)
	}
	seq, err := NewSequential("s", NewFlatten("flat"), ReLU, d)
	if err != nil {
		t.Fatal(err)
	}
	checkGradients(t, randTensor(13, 1, 3, 2, 2, 3), one(seq))
	r, err := NewReshape("rs", 3, 4)
	if err != nil {
		t.Fatal(err)
	}
	seq2, err := NewSequential("s2", r, ELU, NewFlatten("f2"), d)
	if err != nil {
		t.Fatal(err)
	}
	checkGradients(t, randTensor(14, 1, 3, 12), one(seq2))
}
