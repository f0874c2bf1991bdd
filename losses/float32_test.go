package losses_test

import (
	"math/rand/v2"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
)

// Every function builds and differentiates in float32 too. The float32
// values and gradients are compared with the float64 ones, which the other
// tests check against gonum and diff/fd; tolerance 1e-4 relative (floor
// 1e-2): single precision keeps about 7 digits and these graphs chain a
// dozen roundings.
func TestFloat32MatchesFloat64(t *testing.T) {
	rng := rand.New(rand.NewPCG(80, 81))
	const n, d = 3, 4
	a := func(name string, rows int, data []float64) arg { round32(data); return arg{name, rows, d, data} }
	x01 := make([]float64, n*d)
	for i := range x01 {
		x01[i] = float64(rng.IntN(2))
	}
	type builder func(in []*G.Node) (*G.Node, error)
	cases := []struct {
		name  string
		args  []arg
		build builder
	}{
		{"KLStandardNormal", []arg{a("mu", n, randn(rng, n*d, 1)), a("lv", n, uniform(rng, n*d, -2, 2))},
			func(in []*G.Node) (*G.Node, error) { return losses.KLStandardNormal(in[0], in[1]) }},
		{"KLDiagonal", []arg{a("mu1", n, randn(rng, n*d, 1)), a("lv1", n, uniform(rng, n*d, -2, 2)), a("mu2", 1, randn(rng, d, 1)), a("lv2", 1, uniform(rng, d, -2, 2))},
			func(in []*G.Node) (*G.Node, error) { return losses.KLDiagonal(in[0], in[1], in[2], in[3]) }},
		{"BernoulliLogProb", []arg{a("x", n, x01), a("l", n, uniform(rng, n*d, -30, 30))},
			func(in []*G.Node) (*G.Node, error) { return losses.BernoulliLogProb(in[0], in[1]) }},
		{"GaussianLogProb", []arg{a("x", n, randn(rng, n*d, 1)), a("m", n, randn(rng, n*d, 1))},
			func(in []*G.Node) (*G.Node, error) { return losses.GaussianLogProb(in[0], in[1], 0.3) }},
		{"GaussianLogProbLearned", []arg{a("x", n, randn(rng, n*d, 1)), a("m", n, randn(rng, n*d, 1)), a("ls", 1, uniform(rng, d, -1, 1))},
			func(in []*G.Node) (*G.Node, error) { return losses.GaussianLogProbLearned(in[0], in[1], in[2]) }},
		{"DiagGaussianLogProb", []arg{a("z", n, randn(rng, n*d, 1)), a("mu", n, randn(rng, n*d, 1)), a("lv", 1, uniform(rng, d, -1, 1))},
			func(in []*G.Node) (*G.Node, error) { return losses.DiagGaussianLogProb(in[0], in[1], in[2]) }},
		{"StandardNormalLogProb", []arg{a("z", n, randn(rng, n*d, 1))},
			func(in []*G.Node) (*G.Node, error) { return losses.StandardNormalLogProb(in[0]) }},
		{"LogSumExp", []arg{a("a", n, randn(rng, n*d, 3))},
			func(in []*G.Node) (*G.Node, error) { return losses.LogSumExp(in[0], 1) }},
		{"ImportanceWeighted", []arg{a("logW", n, randn(rng, n*d, 3))},
			func(in []*G.Node) (*G.Node, error) { return losses.ImportanceWeighted(in[0]) }},
		{"ELBO", []arg{a("ll", n, randn(rng, n*d, 3)), a("kl", n, uniform(rng, n*d, 0, 2))},
			func(in []*G.Node) (*G.Node, error) {
				ll, err := losses.PerSample(in[0])
				if err != nil {
					return nil, err
				}
				kl, err := losses.PerSample(in[1])
				if err != nil {
					return nil, err
				}
				var beta *G.Node
				if in[0].Dtype() == tensor.Float32 {
					beta = G.NewConstant(float32(0.7))
				} else {
					beta = G.NewConstant(0.7)
				}
				return losses.ELBO(ll, kl, beta)
			}},
	}
	for _, c := range cases {
		var vals, grads [2][]float64
		for k, dt := range []tensor.Dtype{tensor.Float64, tensor.Float32} {
			g := G.NewGraph()
			in := make([]*G.Node, len(c.args))
			for i, ar := range c.args {
				in[i] = input(g, dt, ar.name, ar.rows, ar.cols, ar.data)
			}
			out, err := c.build(in)
			if err != nil {
				t.Fatalf("%s %v: %v", c.name, dt, err)
			}
			if out.Dtype() != dt {
				t.Fatalf("%s: output dtype %v, want %v", c.name, out.Dtype(), dt)
			}
			cost, err := losses.BatchTotal(out)
			if err != nil {
				t.Fatal(err)
			}
			gs, err := G.Grad(cost, in...)
			if err != nil {
				t.Fatalf("%s %v: grad: %v", c.name, dt, err)
			}
			ow := watch(out)
			gws := make([]*G.Value, len(gs))
			for i, gn := range gs {
				gws[i] = watch(gn)
			}
			run(t, g)
			vals[k] = values(t, ow)
			for _, gw := range gws {
				grads[k] = append(grads[k], values(t, gw)...)
			}
		}
		// reference: the float64 graph (checked against gonum and diff/fd
		// in the other tests)
		checkAll(t, c.name+" float32 value", vals[1], vals[0], 1e-4, 1e-2)
		checkAll(t, c.name+" float32 gradient", grads[1], grads[0], 1e-4, 1e-2)
	}
}
