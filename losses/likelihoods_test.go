package losses_test

import (
	"encoding/json"
	"errors"
	"math"
	"math/rand/v2"
	"reflect"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// Compile-time checks that the built-in likelihoods implement Likelihood.
var (
	_ losses.Likelihood = losses.Bernoulli{}
	_ losses.Likelihood = losses.Gaussian{}
	_ losses.Likelihood = (*losses.LearnedGaussian)(nil)
)

// softplusRef is log(1 + exp(x)) in float64, branch-stable.
func softplusRef(x float64) float64 { return -logSigmoid(-x) }

func TestLikelihoodsMatchGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(70, 71))
	const n, f = 3, 4
	x01 := make([]float64, n*f)
	for i := range x01 {
		if rng.Float64() < 0.5 {
			x01[i] = 1
		}
	}
	xr, out := randn(rng, n*f, 1), randn(rng, n*f, 2)
	lsParam := uniform(rng, f, -1, 1)
	for _, dt := range dtypes {
		round32(xr, out, lsParam)
		lg, err := losses.NewLearnedGaussian("dec", f, dt)
		if err != nil {
			t.Fatal(err)
		}
		// Set the log sigma parameter to non-zero values.
		switch d := lg.Params()[0].Value.Data().(type) {
		case []float64:
			copy(d, lsParam)
		case []float32:
			for i := range d {
				d[i] = float32(lsParam[i])
			}
		}
		cases := []struct {
			name string
			l    losses.Likelihood
			x    []float64
			ref  func(x, out float64, j int) float64
			mean func(out float64) float64
		}{
			{"Bernoulli", losses.Bernoulli{}, x01,
				// reference: gonum stat/distuv Bernoulli.LogProb, P = sigmoid(out)
				func(x, o float64, _ int) float64 { return distuv.Bernoulli{P: sigmoid(o)}.LogProb(x) },
				sigmoid},
			{"Gaussian zero value", losses.Gaussian{}, xr,
				// reference: gonum stat/distuv Normal.LogProb, sigma 1
				func(x, o float64, _ int) float64 { return distuv.Normal{Mu: o, Sigma: 1}.LogProb(x) },
				func(o float64) float64 { return o }},
			{"Gaussian 0.5", losses.Gaussian{Sigma: 0.5}, xr,
				// reference: gonum stat/distuv Normal.LogProb, sigma 0.5
				func(x, o float64, _ int) float64 { return distuv.Normal{Mu: o, Sigma: 0.5}.LogProb(x) },
				func(o float64) float64 { return o }},
			{"LearnedGaussian", lg, xr,
				// reference: gonum stat/distuv Normal.LogProb with the
				// documented bound log sigma = MinLogSigma + softplus(r - MinLogSigma)
				func(x, o float64, j int) float64 {
					ls := losses.MinLogSigma + softplusRef(lsParam[j]-losses.MinLogSigma)
					return distuv.Normal{Mu: o, Sigma: math.Exp(ls)}.LogProb(x)
				},
				func(o float64) float64 { return o }},
		}
		for _, c := range cases {
			g := G.NewGraph()
			s := layers.NewScope(g)
			xn := input(g, dt, "x", n, f, c.x)
			on := input(g, dt, "out", n, f, out)
			lp, err := c.l.LogProb(s, xn, on)
			if err != nil {
				t.Fatalf("%s: %v", c.name, err)
			}
			mn, err := c.l.Mean(s, on)
			if err != nil {
				t.Fatalf("%s: %v", c.name, err)
			}
			if lp.Shape().Dims() != 1 || lp.Shape()[0] != n {
				t.Fatalf("%s: LogProb shape %v, want (%d)", c.name, lp.Shape(), n)
			}
			if len(s.Params()) != len(c.l.Params()) {
				t.Errorf("%s: scope bound %d params, likelihood lists %d", c.name, len(s.Params()), len(c.l.Params()))
			}
			lpw, mnw := watch(lp), watch(mn)
			run(t, g)
			want := make([]float64, n)
			wantMean := make([]float64, n*f)
			for i := 0; i < n*f; i++ {
				want[i/f] += c.ref(c.x[i], out[i], i%f)
				wantMean[i] = c.mean(out[i])
			}
			tol := valTol(dt)
			if dt == tensor.Float32 {
				tol = 1e-4 // sums of F float32 terms of mixed sign
			}
			checkAll(t, c.name+" LogProb "+dt.String(), values(t, lpw), want, tol, 1)
			checkAll(t, c.name+" Mean "+dt.String(), values(t, mnw), wantMean, tol, 1e-3)
		}
	}
}

// The soft lower bound: log sigma never drops below MinLogSigma however
// negative the parameter, and the gradient reaching it stays non-zero.
func TestLearnedGaussianLowerBound(t *testing.T) {
	lg, err := losses.NewLearnedGaussian("dec", 3, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	p := lg.Params()[0]
	if p.Name != "dec.log_sigma" || !p.Value.Shape().Eq(tensor.Shape{1, 3}) {
		t.Fatalf("param %q shape %v", p.Name, p.Value.Shape())
	}
	for _, v := range p.Value.Data().([]float64) {
		if v != 0 {
			t.Fatalf("log sigma not initialised to 0: %v", p.Value.Data())
		}
	}
	raw := []float64{0, -30, 5}
	copy(p.Value.Data().([]float64), raw)
	g := G.NewGraph()
	s := layers.NewScope(g)
	ls, err := lg.LogSigma(s)
	if err != nil {
		t.Fatal(err)
	}
	cost, err := losses.BatchTotal(ls)
	if err != nil {
		t.Fatal(err)
	}
	grads, err := G.Grad(cost, s.Nodes()...)
	if err != nil {
		t.Fatal(err)
	}
	lsw, gw := watch(ls), watch(grads[0])
	run(t, g)
	got, grad := values(t, lsw), values(t, gw)
	for i, r := range raw {
		// reference: log(1e-3) + log1p(exp(r - log(1e-3))) in float64, the
		// documented formula; its derivative is sigmoid(r - log 1e-3)
		want := math.Log(1e-3) + softplusRef(r-math.Log(1e-3))
		wantGrad := math.Exp(logSigmoid(r - math.Log(1e-3)))
		if !closeTo(got[i], want, 1e-12, 1) || got[i] < losses.MinLogSigma || !closeTo(grad[i], wantGrad, 1e-9, 1e-12) || grad[i] <= 0 {
			t.Errorf("r=%v: log sigma %v (want %v), gradient %v (want %v)", r, got[i], want, grad[i], wantGrad)
		}
	}
	if math.Abs(got[0]) > 1.001e-3 {
		t.Errorf("at r = 0 log sigma %v, documented to be within 1e-3 of 0", got[0])
	}
}

func TestLearnedGaussianGradient(t *testing.T) {
	rng := rand.New(rand.NewPCG(72, 73))
	const n, f = 3, 4
	x, mean, r := randn(rng, n*f, 1), randn(rng, n*f, 1), uniform(rng, f, -2, 1)
	lg, err := losses.NewLearnedGaussian("dec", f, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	gradCheckWRT(t, "LearnedGaussian.LogProb", []arg{{"x", n, f, x}, {"mean", n, f, mean}, {"r", 1, f, r}},
		func(in []*G.Node) (*G.Node, []*G.Node, error) {
			// The parameter takes the value of the r input; the gradient is
			// taken with respect to the node the scope binds for it.
			copy(lg.Params()[0].Value.Data().([]float64), r)
			s := layers.NewScope(in[0].Graph())
			lp, err := lg.LogProb(s, in[0], in[1])
			if err != nil {
				return nil, nil, err
			}
			return lp, []*G.Node{in[0], in[1], s.Nodes()[0]}, nil
		},
		func(in [][]float64) []float64 {
			out := make([]float64, n)
			for i := 0; i < n*f; i++ {
				ls := losses.MinLogSigma + softplusRef(in[2][i%f]-losses.MinLogSigma)
				out[i/f] += distuv.Normal{Mu: in[1][i], Sigma: math.Exp(ls)}.LogProb(in[0][i])
			}
			return out
		})
}

func TestLikelihoodSpecRoundTrip(t *testing.T) {
	lg, err := losses.NewLearnedGaussian("decoder", 7, tensor.Float32)
	if err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		l    losses.Likelihood
		want losses.LikelihoodSpec
	}{
		{losses.Bernoulli{}, losses.LikelihoodSpec{Kind: losses.KindBernoulli}},
		{&losses.Bernoulli{}, losses.LikelihoodSpec{Kind: losses.KindBernoulli}},
		{losses.Gaussian{Sigma: 0.25}, losses.LikelihoodSpec{Kind: losses.KindGaussian, Sigma: 0.25}},
		{&losses.Gaussian{}, losses.LikelihoodSpec{Kind: losses.KindGaussian, Sigma: 1}}, // zero value means 1
		{lg, losses.LikelihoodSpec{Kind: losses.KindLearnedGaussian, Features: 7, Name: "decoder"}},
	}
	for _, c := range cases {
		spec, ok := losses.DescribeLikelihood(c.l)
		if !ok || !reflect.DeepEqual(spec, c.want) {
			t.Errorf("DescribeLikelihood(%T) = %+v, %v; want %+v", c.l, spec, ok, c.want)
			continue
		}
		// Through JSON, as a checkpoint stores it.
		b, err := json.Marshal(spec)
		if err != nil {
			t.Fatal(err)
		}
		var back losses.LikelihoodSpec
		if err := json.Unmarshal(b, &back); err != nil {
			t.Fatal(err)
		}
		l, err := losses.LikelihoodFromSpec(back, tensor.Float32)
		if err != nil {
			t.Fatalf("LikelihoodFromSpec(%+v): %v", back, err)
		}
		again, ok := losses.DescribeLikelihood(l)
		if !ok || !reflect.DeepEqual(again, c.want) {
			t.Errorf("rebuilt %T describes as %+v, want %+v", l, again, c.want)
		}
		if lg2, ok := l.(*losses.LearnedGaussian); ok {
			p := lg2.Params()[0]
			if p.Name != "decoder.log_sigma" || p.Value.Dtype() != tensor.Float32 || !p.Value.Shape().Eq(tensor.Shape{1, 7}) {
				t.Errorf("rebuilt param %q %v %v", p.Name, p.Value.Dtype(), p.Value.Shape())
			}
		}
	}
	// A user likelihood is not described.
	if _, ok := losses.DescribeLikelihood(nil); ok {
		t.Error("DescribeLikelihood(nil) reported ok")
	}
	if _, ok := losses.DescribeLikelihood((*losses.LearnedGaussian)(nil)); ok {
		t.Error("DescribeLikelihood of a nil *LearnedGaussian reported ok")
	}
}

func TestLikelihoodBadInput(t *testing.T) {
	_, err := losses.LikelihoodFromSpec(losses.LikelihoodSpec{Kind: "poisson"}, tensor.Float64)
	if !errors.Is(err, losses.ErrUnknownLikelihood) || !containsWord(err.Error(), "spec.Kind \"poisson\"") {
		t.Errorf("unknown kind: %v", err)
	}
	bad := []struct {
		name string
		arg  string
		spec losses.LikelihoodSpec
		dt   tensor.Dtype
	}{
		{"gaussian sigma 0", "spec.Sigma", losses.LikelihoodSpec{Kind: losses.KindGaussian}, tensor.Float64},
		{"gaussian sigma NaN", "spec.Sigma", losses.LikelihoodSpec{Kind: losses.KindGaussian, Sigma: math.NaN()}, tensor.Float64},
		{"learned no name", "name", losses.LikelihoodSpec{Kind: losses.KindLearnedGaussian, Features: 2}, tensor.Float64},
		{"learned no features", "features", losses.LikelihoodSpec{Kind: losses.KindLearnedGaussian, Name: "d"}, tensor.Float64},
		{"dtype", "dtype", losses.LikelihoodSpec{Kind: losses.KindBernoulli}, tensor.Int},
	}
	for _, c := range bad {
		_, err := losses.LikelihoodFromSpec(c.spec, c.dt)
		if !errors.Is(err, layers.ErrInvalidArgument) || !containsWord(err.Error(), c.arg) {
			t.Errorf("%s: error %v", c.name, err)
		}
	}
	if _, err := losses.NewLearnedGaussian("d", 2, tensor.Int); !errors.Is(err, layers.ErrInvalidArgument) || !containsWord(err.Error(), "dtype") {
		t.Errorf("NewLearnedGaussian int dtype: %v", err)
	}

	g := G.NewGraph()
	s := layers.NewScope(g)
	m := input(g, tensor.Float64, "m", 2, 3, make([]float64, 6))
	wide := input(g, tensor.Float64, "wide", 2, 4, make([]float64, 8))
	m32 := input(g, tensor.Float32, "m32", 2, 3, make([]float64, 6))
	lg, err := losses.NewLearnedGaussian("d", 3, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	var zero losses.LearnedGaussian
	cases := []struct {
		name string
		arg  string
		call func() (*G.Node, error)
	}{
		{"Bernoulli nil x", "x", func() (*G.Node, error) { return losses.Bernoulli{}.LogProb(s, nil, m) }},
		{"Bernoulli shape", "logits", func() (*G.Node, error) { return losses.Bernoulli{}.LogProb(s, m, wide) }},
		{"Bernoulli Mean nil", "out", func() (*G.Node, error) { return losses.Bernoulli{}.Mean(s, nil) }},
		{"Gaussian negative sigma", "sigma", func() (*G.Node, error) { return losses.Gaussian{Sigma: -1}.LogProb(s, m, m) }},
		{"Gaussian Mean nil", "out", func() (*G.Node, error) { return losses.Gaussian{}.Mean(s, nil) }},
		{"Learned features", "x", func() (*G.Node, error) { return lg.LogProb(s, wide, wide) }},
		{"Learned dtype", "x", func() (*G.Node, error) { return lg.LogProb(s, m32, m32) }},
		{"Learned nil out", "mean", func() (*G.Node, error) { return lg.LogProb(s, m, nil) }},
		{"Learned nil scope", "s", func() (*G.Node, error) { return lg.LogProb(nil, m, m) }},
		{"Learned zero value", "l", func() (*G.Node, error) { return zero.LogSigma(s) }},
		{"Learned Mean nil", "out", func() (*G.Node, error) { return lg.Mean(s, nil) }},
	}
	checkBad(t, cases)
}
