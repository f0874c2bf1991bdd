package losses_test

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
)

func sigmoid(l float64) float64 { return 1 / (1 + math.Exp(-l)) }

// valTol is the tolerance of a forward value: 1e-9 relative in float64;
// 1e-5 relative in float32 (about 7 significant digits, a few roundings).
func valTol(dt tensor.Dtype) float64 {
	if dt == tensor.Float32 {
		return 1e-5
	}
	return 1e-9
}

// eval builds one node from matrix inputs and returns its values.
func eval(t *testing.T, dt tensor.Dtype, args []arg, build func(in []*G.Node) (*G.Node, error)) []float64 {
	t.Helper()
	g := G.NewGraph()
	in := make([]*G.Node, len(args))
	for i, a := range args {
		in[i] = input(g, dt, a.name, a.rows, a.cols, a.data)
	}
	out, err := build(in)
	if err != nil {
		t.Fatal(err)
	}
	w := watch(out)
	run(t, g)
	return values(t, w)
}

func TestBernoulliLogProbMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(8, 9))
	const n, f = 4, 6
	for _, dt := range dtypes {
		l := uniform(rng, n*f, -6, 6)
		x := make([]float64, n*f)
		for i := range x {
			if rng.Float64() < 0.5 {
				x[i] = 1
			}
		}
		round32(l)
		got := eval(t, dt, []arg{{"x", n, f, x}, {"l", n, f, l}}, func(in []*G.Node) (*G.Node, error) {
			return losses.BernoulliLogProb(in[0], in[1])
		})
		want := make([]float64, n*f)
		for i := range want {
			// reference: gonum stat/distuv Bernoulli.LogProb with P = sigmoid(l)
			want[i] = distuv.Bernoulli{P: sigmoid(l[i])}.LogProb(x[i])
		}
		checkAll(t, "BernoulliLogProb "+dt.String(), got, want, valTol(dt), 1e-6)
	}
}

// logSigmoid is log sigmoid(l) from the identity log sigmoid(l) =
// -softplus(-l) = -log1p(exp(-l)), evaluated in float64 on the branch where
// exp cannot overflow (for l < 0: l - log1p(exp(l))). A closed-form identity,
// not the package's code path.
func logSigmoid(l float64) float64 {
	if l >= 0 {
		return -math.Log1p(math.Exp(-l))
	}
	return l - math.Log1p(math.Exp(l))
}

// Extreme logits. gonum's Bernoulli takes P = sigmoid(l), and sigmoid(80)
// rounds to exactly 1.0 in float64, so its LogProb(0) = log(1 - 1) = -Inf
// although the true value is -80 - 1.8e-35. The reference is therefore the
// identity log p(1) = log sigmoid(l), log p(0) = log sigmoid(-l) above.
func TestBernoulliLogProbExtremeLogits(t *testing.T) {
	logits := []float64{80, -80, 1e4, -1e4, 80, -80, 1e4, -1e4, 0, 0}
	x := []float64{0, 0, 0, 0, 1, 1, 1, 1, 0, 1}
	n := len(x)
	for _, dt := range dtypes {
		g := G.NewGraph()
		xn := input(g, dt, "x", n, 1, x)
		ln := input(g, dt, "l", n, 1, logits)
		lp, err := losses.BernoulliLogProb(xn, ln)
		if err != nil {
			t.Fatal(err)
		}
		cost, err := losses.BatchTotal(lp)
		if err != nil {
			t.Fatal(err)
		}
		grads, err := G.Grad(cost, ln)
		if err != nil {
			t.Fatal(err)
		}
		lpw, gw := watch(lp), watch(grads[0])
		run(t, g)
		got, grad := values(t, lpw), values(t, gw)
		for i := range x {
			want := logSigmoid(logits[i])
			if x[i] == 0 {
				want = logSigmoid(-logits[i])
			}
			// reference: log sigmoid identity above, float64 math.Log1p
			if math.IsInf(got[i], 0) || math.IsNaN(got[i]) || !closeTo(got[i], want, valTol(dt), 1e-6) {
				t.Errorf("%v: log p(x=%v | l=%v) = %v, want %v", dt, x[i], logits[i], got[i], want)
			}
			// reference: d/dl log p(x | l) = x - sigmoid(l) (differentiate the
			// identity), written for x in {0, 1} as sigmoid(-l) for x = 1 and
			// -sigmoid(l) for x = 0 to avoid 1 - sigmoid(80) = 0 in float64;
			// sigmoid from exp(log sigmoid)
			wantGrad := -math.Exp(logSigmoid(logits[i]))
			if x[i] == 1 {
				wantGrad = math.Exp(logSigmoid(-logits[i]))
			}
			// Relative tolerance even for tiny gradients (sigmoid(-80) is
			// 1.8e-35): the gradient is formed without cancellation.
			if math.IsInf(grad[i], 0) || math.IsNaN(grad[i]) || !closeTo(grad[i], wantGrad, valTol(dt), 1e-300) {
				t.Errorf("%v: gradient at x=%v, l=%v = %v, want %v", dt, x[i], logits[i], grad[i], wantGrad)
			}
		}
	}
}

func TestGaussianLogProbMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(10, 11))
	const n, f = 3, 5
	for _, dt := range dtypes {
		x, mean := randn(rng, n*f, 2), randn(rng, n*f, 2)
		logSigma := uniform(rng, f, -1.5, 1.5)
		round32(x, mean, logSigma)
		for _, sigma := range []float64{0.1, 1, 3.5} {
			got := eval(t, dt, []arg{{"x", n, f, x}, {"mean", n, f, mean}}, func(in []*G.Node) (*G.Node, error) {
				return losses.GaussianLogProb(in[0], in[1], sigma)
			})
			want := make([]float64, n*f)
			for i := range want {
				// reference: gonum stat/distuv Normal.LogProb
				want[i] = distuv.Normal{Mu: mean[i], Sigma: sigma}.LogProb(x[i])
			}
			checkAll(t, "GaussianLogProb "+dt.String(), got, want, valTol(dt), 1e-3)
		}
		for _, rows := range []int{1, n} {
			ls := logSigma
			if rows == n {
				ls = nil
				for r := 0; r < n; r++ {
					ls = append(ls, logSigma...)
				}
			}
			got := eval(t, dt, []arg{{"x", n, f, x}, {"mean", n, f, mean}, {"ls", rows, f, ls}}, func(in []*G.Node) (*G.Node, error) {
				return losses.GaussianLogProbLearned(in[0], in[1], in[2])
			})
			want := make([]float64, n*f)
			for i := range want {
				// reference: gonum stat/distuv Normal.LogProb, sigma = exp(logSigma)
				want[i] = distuv.Normal{Mu: mean[i], Sigma: math.Exp(logSigma[i%f])}.LogProb(x[i])
			}
			checkAll(t, "GaussianLogProbLearned "+dt.String(), got, want, valTol(dt), 1e-3)
		}
	}
}

// The documented relation to the squared error: with sigma = 1 the
// negative log-likelihood of a record is 0.5*SSE + (F/2)*log(2 pi).
func TestGaussianLogProbSquaredError(t *testing.T) {
	rng := rand.New(rand.NewPCG(12, 13))
	const n, f = 4, 7
	x, mean := randn(rng, n*f, 1), randn(rng, n*f, 1)
	for _, sigma := range []float64{1, 0.25} {
		got := eval(t, tensor.Float64, []arg{{"x", n, f, x}, {"mean", n, f, mean}}, func(in []*G.Node) (*G.Node, error) {
			lp, err := losses.GaussianLogProb(in[0], in[1], sigma)
			if err != nil {
				return nil, err
			}
			return losses.PerSample(lp)
		})
		for r := 0; r < n; r++ {
			sse, logp := 0.0, 0.0
			for j := 0; j < f; j++ {
				d := x[r*f+j] - mean[r*f+j]
				sse += d * d
				// reference: gonum stat/distuv Normal.LogProb, summed over features
				logp += distuv.Normal{Mu: mean[r*f+j], Sigma: sigma}.LogProb(x[r*f+j])
			}
			// The closed form -(1/(2 s^2)) SSE - F log s - (F/2) log(2 pi)
			// must agree with the gonum sum, and the graph with both.
			closed := -sse/(2*sigma*sigma) - f*math.Log(sigma) - f/2.0*math.Log(2*math.Pi)
			if !closeTo(closed, logp, 1e-12, 1) || !closeTo(got[r], logp, 1e-9, 1) {
				t.Errorf("sigma %v record %d: graph %v, closed form %v, gonum %v", sigma, r, got[r], closed, logp)
			}
		}
	}
}

func TestDiagGaussianLogProbMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(14, 15))
	const n, d = 4, 3
	for _, dt := range dtypes {
		z := randn(rng, n*d, 1.5)
		round32(z)
		for _, rows := range []int{n, 1} {
			mu, lv := randn(rng, rows*d, 1), uniform(rng, rows*d, -2, 2)
			round32(mu, lv)
			got := eval(t, dt, []arg{{"z", n, d, z}, {"mu", rows, d, mu}, {"lv", rows, d, lv}}, func(in []*G.Node) (*G.Node, error) {
				return losses.DiagGaussianLogProb(in[0], in[1], in[2])
			})
			want := make([]float64, n*d)
			for i := range want {
				j := i
				if rows == 1 {
					j = i % d
				}
				// reference: gonum stat/distuv Normal.LogProb, sigma = exp(logVar/2)
				want[i] = distuv.Normal{Mu: mu[j], Sigma: math.Exp(lv[j] / 2)}.LogProb(z[i])
			}
			checkAll(t, "DiagGaussianLogProb "+dt.String(), got, want, valTol(dt), 1e-3)
		}
		got := eval(t, dt, []arg{{"z", n, d, z}}, func(in []*G.Node) (*G.Node, error) {
			return losses.StandardNormalLogProb(in[0])
		})
		want := make([]float64, n*d)
		for i := range want {
			// reference: gonum stat/distuv UnitNormal.LogProb
			want[i] = distuv.UnitNormal.LogProb(z[i])
		}
		checkAll(t, "StandardNormalLogProb "+dt.String(), got, want, valTol(dt), 1e-3)
	}
}

func TestLogProbGradients(t *testing.T) {
	rng := rand.New(rand.NewPCG(16, 17))
	const n, f = 3, 4
	x01 := make([]float64, n*f)
	for i := range x01 {
		if rng.Float64() < 0.5 {
			x01[i] = 1
		}
	}
	l := uniform(rng, n*f, -4, 4)
	l[0] = 0 // the kink of max(l, 0): the gradient must still be x - 1/2
	gradCheck(t, "BernoulliLogProb", []arg{{"x", n, f, x01}, {"l", n, f, l}},
		func(in []*G.Node) (*G.Node, error) { return losses.BernoulliLogProb(in[0], in[1]) },
		func(in [][]float64) []float64 {
			out := make([]float64, n*f)
			for i := range out {
				// log p = x log sigmoid(l) + (1-x) log sigmoid(-l), which is
				// also the continuous cross-entropy for x in [0,1]
				out[i] = in[0][i]*logSigmoid(in[1][i]) + (1-in[0][i])*logSigmoid(-in[1][i])
			}
			return out
		})
	x, mean := randn(rng, n*f, 1), randn(rng, n*f, 1)
	const sigma = 0.7
	gradCheck(t, "GaussianLogProb", []arg{{"x", n, f, x}, {"mean", n, f, mean}},
		func(in []*G.Node) (*G.Node, error) { return losses.GaussianLogProb(in[0], in[1], sigma) },
		func(in [][]float64) []float64 {
			out := make([]float64, n*f)
			for i := range out {
				out[i] = distuv.Normal{Mu: in[1][i], Sigma: sigma}.LogProb(in[0][i])
			}
			return out
		})
	ls := uniform(rng, f, -1, 1)
	gradCheck(t, "GaussianLogProbLearned", []arg{{"x", n, f, x}, {"mean", n, f, mean}, {"ls", 1, f, ls}},
		func(in []*G.Node) (*G.Node, error) { return losses.GaussianLogProbLearned(in[0], in[1], in[2]) },
		func(in [][]float64) []float64 {
			out := make([]float64, n*f)
			for i := range out {
				out[i] = distuv.Normal{Mu: in[1][i], Sigma: math.Exp(in[2][i%f])}.LogProb(in[0][i])
			}
			return out
		})
	z, mu, lv := randn(rng, n*f, 1), randn(rng, n*f, 1), uniform(rng, n*f, -1, 1)
	gradCheck(t, "DiagGaussianLogProb", []arg{{"z", n, f, z}, {"mu", n, f, mu}, {"lv", n, f, lv}},
		func(in []*G.Node) (*G.Node, error) { return losses.DiagGaussianLogProb(in[0], in[1], in[2]) },
		func(in [][]float64) []float64 {
			out := make([]float64, n*f)
			for i := range out {
				out[i] = distuv.Normal{Mu: in[1][i], Sigma: math.Exp(in[2][i] / 2)}.LogProb(in[0][i])
			}
			return out
		})
	gradCheck(t, "DiagGaussianLogProb row", []arg{{"z", n, f, z}, {"mu", 1, f, mu[:f]}, {"lv", 1, f, lv[:f]}},
		func(in []*G.Node) (*G.Node, error) { return losses.DiagGaussianLogProb(in[0], in[1], in[2]) },
		func(in [][]float64) []float64 {
			out := make([]float64, n*f)
			for i := range out {
				out[i] = distuv.Normal{Mu: in[1][i%f], Sigma: math.Exp(in[2][i%f] / 2)}.LogProb(in[0][i])
			}
			return out
		})
	gradCheck(t, "StandardNormalLogProb", []arg{{"z", n, f, z}},
		func(in []*G.Node) (*G.Node, error) { return losses.StandardNormalLogProb(in[0]) },
		func(in [][]float64) []float64 {
			out := make([]float64, n*f)
			for i := range out {
				out[i] = distuv.UnitNormal.LogProb(in[0][i])
			}
			return out
		})
}

func TestLogProbBadInput(t *testing.T) {
	g := G.NewGraph()
	m := input(g, tensor.Float64, "m", 2, 3, make([]float64, 6))
	m32 := input(g, tensor.Float32, "m32", 2, 3, make([]float64, 6))
	wrong := input(g, tensor.Float64, "wrong", 2, 4, make([]float64, 8))
	row := input(g, tensor.Float64, "row", 1, 3, make([]float64, 3))
	rowWrong := input(g, tensor.Float64, "rowWrong", 1, 2, make([]float64, 2))
	cases := []struct {
		name string
		arg  string
		call func() (*G.Node, error)
	}{
		{"Bernoulli nil x", "x", func() (*G.Node, error) { return losses.BernoulliLogProb(nil, m) }},
		{"Bernoulli nil logits", "logits", func() (*G.Node, error) { return losses.BernoulliLogProb(m, nil) }},
		{"Bernoulli shape", "logits", func() (*G.Node, error) { return losses.BernoulliLogProb(m, wrong) }},
		{"Bernoulli dtype", "logits", func() (*G.Node, error) { return losses.BernoulliLogProb(m, m32) }},
		{"Gaussian nil x", "x", func() (*G.Node, error) { return losses.GaussianLogProb(nil, m, 1) }},
		{"Gaussian nil mean", "mean", func() (*G.Node, error) { return losses.GaussianLogProb(m, nil, 1) }},
		{"Gaussian shape", "mean", func() (*G.Node, error) { return losses.GaussianLogProb(m, row, 1) }},
		{"Gaussian sigma 0", "sigma", func() (*G.Node, error) { return losses.GaussianLogProb(m, m, 0) }},
		{"Gaussian sigma <0", "sigma", func() (*G.Node, error) { return losses.GaussianLogProb(m, m, -1) }},
		{"Gaussian sigma NaN", "sigma", func() (*G.Node, error) { return losses.GaussianLogProb(m, m, math.NaN()) }},
		{"Gaussian sigma Inf", "sigma", func() (*G.Node, error) { return losses.GaussianLogProb(m, m, math.Inf(1)) }},
		{"Learned nil x", "x", func() (*G.Node, error) { return losses.GaussianLogProbLearned(nil, m, row) }},
		{"Learned nil mean", "mean", func() (*G.Node, error) { return losses.GaussianLogProbLearned(m, nil, row) }},
		{"Learned nil logSigma", "logSigma", func() (*G.Node, error) { return losses.GaussianLogProbLearned(m, m, nil) }},
		{"Learned logSigma shape", "logSigma", func() (*G.Node, error) { return losses.GaussianLogProbLearned(m, m, rowWrong) }},
		{"Learned logSigma dtype", "logSigma", func() (*G.Node, error) { return losses.GaussianLogProbLearned(m, m, m32) }},
		{"Diag nil z", "z", func() (*G.Node, error) { return losses.DiagGaussianLogProb(nil, m, m) }},
		{"Diag nil mu", "mu", func() (*G.Node, error) { return losses.DiagGaussianLogProb(m, nil, m) }},
		{"Diag nil logVar", "logVar", func() (*G.Node, error) { return losses.DiagGaussianLogProb(m, m, nil) }},
		{"Diag mu shape", "mu", func() (*G.Node, error) { return losses.DiagGaussianLogProb(m, wrong, m) }},
		{"Diag logVar shape", "logVar", func() (*G.Node, error) { return losses.DiagGaussianLogProb(m, row, rowWrong) }},
		{"StandardNormal nil", "z", func() (*G.Node, error) { return losses.StandardNormalLogProb(nil) }},
	}
	checkBad(t, cases)
}
