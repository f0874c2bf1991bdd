package losses_test

import (
	"math/rand/v2"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// TestBernoulliLikelihoodGradients checks Bernoulli.LogProb, which sums the
// per-feature terms inside one fused op, value and gradient with respect to
// both x (grey levels in [0, 1] as well as 0 and 1) and the logits, against
// the closed form x log sigmoid(l) + (1-x) log sigmoid(-l) summed per record
// and gonum diff/fd central differences of it (see gradCheck).
func TestBernoulliLikelihoodGradients(t *testing.T) {
	rng := rand.New(rand.NewPCG(18, 19))
	for _, shape := range [][2]int{{3, 5}, {1, 7}} {
		n, f := shape[0], shape[1]
		x := uniform(rng, n*f, 0, 1)
		for i := 0; i < n*f; i += 2 {
			x[i] = float64(rng.IntN(2))
		}
		l := uniform(rng, n*f, -6, 6)
		l[1] = 0 // the kink of max(l, 0)
		gradCheck(t, "Bernoulli.LogProb", []arg{{"x", n, f, x}, {"l", n, f, l}},
			func(in []*G.Node) (*G.Node, error) { return losses.Bernoulli{}.LogProb(nil, in[0], in[1]) },
			func(in [][]float64) []float64 {
				out := make([]float64, n)
				for i := 0; i < n*f; i++ {
					out[i/f] += in[0][i]*logSigmoid(in[1][i]) + (1-in[0][i])*logSigmoid(-in[1][i])
				}
				return out
			})
	}
}

// TestBernoulliLikelihoodFloat32 compares the float32 Bernoulli.LogProb
// (per-record sums in float64 inside the op) with the float64 one, which
// TestLikelihoodsMatchGonum checks against gonum stat/distuv, on a
// 100 x 784 batch at MNIST's ink density, for two runs of one graph (the op
// reuses its output tensor). Tolerance: 1e-5 relative; the float32 logits
// are the rounded float64 ones and each term carries about 1 ulp.
func TestBernoulliLikelihoodFloat32(t *testing.T) {
	rng := rand.New(rand.NewPCG(20, 21))
	const n, f = 100, 784
	results := map[tensor.Dtype][2][]float64{}
	xs := [2][]float64{make([]float64, n*f), make([]float64, n*f)}
	ls := [2][]float64{uniform(rng, n*f, -12, 12), uniform(rng, n*f, -3, 3)}
	for r := range xs {
		for i := range xs[r] {
			if rng.Float64() < 0.13 {
				xs[r][i] = 1
			}
		}
		round32(ls[r])
	}
	for _, dt := range dtypes {
		g := G.NewGraph()
		xT, lT := denseOf(dt, []int{n, f}, xs[0]), denseOf(dt, []int{n, f}, ls[0])
		x := G.NewMatrix(g, dt, G.WithShape(n, f), G.WithValue(xT), G.WithName("x"))
		l := G.NewMatrix(g, dt, G.WithShape(n, f), G.WithValue(lT), G.WithName("l"))
		lp, err := losses.Bernoulli{}.LogProb(layers.NewScope(g), x, l)
		if err != nil {
			t.Fatal(err)
		}
		w := watch(lp)
		vm := G.NewTapeMachine(g)
		var res [2][]float64
		for r := range res {
			setValues(xT, xs[r])
			setValues(lT, ls[r])
			if err := vm.RunAll(); err != nil {
				t.Fatal(err)
			}
			res[r] = values(t, w)
			vm.Reset()
		}
		vm.Close()
		results[dt] = res
	}
	for r := range xs {
		checkAll(t, "float32 against float64 Bernoulli.LogProb", results[tensor.Float32][r], results[tensor.Float64][r], 1e-5, 1e-3)
	}
}

func setValues(d *tensor.Dense, v []float64) {
	switch x := d.Data().(type) {
	case []float64:
		copy(x, v)
	case []float32:
		for i := range x {
			x[i] = float32(v[i])
		}
	}
}
