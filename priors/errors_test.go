package priors

import (
	"errors"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

func TestBadArguments(t *testing.T) {
	opt := layers.Options{Dtype: tensor.Float64}
	enc, err := layers.NewDense("enc", 3, 4, opt)
	if err != nil {
		t.Fatal(err)
	}
	head, err := layers.NewGaussianHead("head", 4, 2, opt)
	if err != nil {
		t.Fatal(err)
	}
	cases := map[string]func() error{
		"standard dim 0":     func() error { _, err := NewStandardNormal(0, tensor.Float64); return err },
		"standard int dtype": func() error { _, err := NewStandardNormal(2, tensor.Int); return err },
		"diagonal dim 0":     func() error { _, err := NewDiagonal("p", 0, tensor.Float64); return err },
		"diagonal no name":   func() error { _, err := NewDiagonal("", 2, tensor.Float64); return err },
		"mixture K 0":        func() error { _, err := NewMixture("m", 0, 2, MixtureOptions{}); return err },
		"mixture dim 0":      func() error { _, err := NewMixture("m", 2, 0, MixtureOptions{}); return err },
		"mixture spread":     func() error { _, err := NewMixture("m", 2, 2, MixtureOptions{Spread: -1}); return err },
		"vamp nil encoder":   func() error { _, err := NewVamp("v", 2, []int{3}, nil, head, VampOptions{}); return err },
		"vamp nil head":      func() error { _, err := NewVamp("v", 2, []int{3}, enc, nil, VampOptions{}); return err },
		"vamp K 0":           func() error { _, err := NewVamp("v", 0, []int{3}, enc, head, VampOptions{}); return err },
		"vamp no shape":      func() error { _, err := NewVamp("v", 2, nil, enc, head, VampOptions{}); return err },
		"vamp bad shape":     func() error { _, err := NewVamp("v", 2, []int{3, 0}, enc, head, VampOptions{}); return err },
		"vamp few data rows": func() error {
			_, err := NewVamp("v", 4, []int{3}, enc, head, VampOptions{Data: denseOf(tensor.Float64, make([]float64, 9), 3, 3)})
			return err
		},
		"vamp data width": func() error {
			_, err := NewVamp("v", 2, []int{3}, enc, head, VampOptions{Data: denseOf(tensor.Float64, make([]float64, 8), 4, 2)})
			return err
		},
	}
	for name, f := range cases {
		if err := f(); !errors.Is(err, layers.ErrInvalidArgument) {
			t.Errorf("%s: error %v, want one wrapping layers.ErrInvalidArgument", name, err)
		}
	}
}

func TestBadLatents(t *testing.T) {
	opt := layers.Options{Dtype: tensor.Float64}
	enc, err := layers.NewDense("enc", 3, 4, opt)
	if err != nil {
		t.Fatal(err)
	}
	head, err := layers.NewGaussianHead("head", 4, 2, opt)
	if err != nil {
		t.Fatal(err)
	}
	std, _ := NewStandardNormal(2, tensor.Float64)
	diag, _ := NewDiagonal("d", 2, tensor.Float64)
	mix, _ := NewMixture("m", 3, 2, MixtureOptions{Dtype: tensor.Float64})
	vamp, err := NewVamp("v", 3, []int{3}, enc, head, VampOptions{})
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range []Prior{std, diag, mix, vamp} {
		g := G.NewGraph()
		s := layers.NewScope(g)
		wide := inputNode(g, tensor.Float64, make([]float64, 6), 2, 3, "wide")
		narrow32 := inputNode(g, tensor.Float32, make([]float64, 4), 2, 2, "f32")
		if _, err := p.LogProb(s, wide); !errors.Is(err, layers.ErrInvalidArgument) {
			t.Errorf("%T: z of width 3: error %v", p, err)
		}
		if _, err := p.LogProb(s, narrow32); !errors.Is(err, layers.ErrInvalidArgument) {
			t.Errorf("%T: float32 z for a float64 prior: error %v", p, err)
		}
		if _, err := p.LogProb(s, nil); !errors.Is(err, layers.ErrInvalidArgument) {
			t.Errorf("%T: nil z: error %v", p, err)
		}
		if _, err := p.LogProb(nil, wide); !errors.Is(err, layers.ErrInvalidArgument) {
			t.Errorf("%T: nil scope: error %v", p, err)
		}
		if _, err := p.Sample(nil, 3); !errors.Is(err, layers.ErrInvalidArgument) {
			t.Errorf("%T: nil rng: error %v", p, err)
		}
		if _, err := p.Sample(newRNG(1), 0); !errors.Is(err, layers.ErrInvalidArgument) {
			t.Errorf("%T: n = 0: error %v", p, err)
		}
		if kl, ok := p.(ClosedFormKL); ok {
			mu := inputNode(g, tensor.Float64, make([]float64, 4), 2, 2, "mu")
			if _, err := kl.KL(s, mu, wide); !errors.Is(err, layers.ErrInvalidArgument) {
				t.Errorf("%T: KL with mismatched logVar: error %v", p, err)
			}
			if _, err := kl.KL(s, wide, wide); !errors.Is(err, layers.ErrInvalidArgument) {
				t.Errorf("%T: KL of width 3: error %v", p, err)
			}
		}
	}
}
