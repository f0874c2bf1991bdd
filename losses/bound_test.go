package losses_test

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/floats"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
)

// column returns column j of a row-major rows x cols matrix.
func column(a []float64, rows, cols, j int) []float64 {
	out := make([]float64, rows)
	for i := range out {
		out[i] = a[i*cols+j]
	}
	return out
}

// lseRef is the log-sum-exp of a along axis from gonum floats.LogSumExp.
func lseRef(a []float64, rows, cols, axis int) []float64 {
	var out []float64
	if axis == 1 {
		for i := 0; i < rows; i++ {
			out = append(out, floats.LogSumExp(a[i*cols:(i+1)*cols]))
		}
		return out
	}
	for j := 0; j < cols; j++ {
		out = append(out, floats.LogSumExp(column(a, rows, cols, j)))
	}
	return out
}

func TestLogSumExpMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(20, 21))
	inf := math.Inf(-1)
	cases := []struct {
		name       string
		rows, cols int
		data       []float64
	}{
		{"moderate", 3, 5, randn(rng, 15, 3)},
		// exp(1000) overflows float64 (max about exp(709.8)), so a naive
		// log(sum(exp(a))) would return +Inf here.
		{"huge", 2, 3, []float64{1e3, 999, 1e3 - 5, -1e3, -1e3 - 1, -998}},
		{"single column", 4, 1, randn(rng, 4, 2)},
		{"single row", 1, 4, randn(rng, 4, 2)},
		{"with -Inf", 2, 3, []float64{inf, 0.5, -2, inf, inf, 1}},
	}
	for _, dt := range dtypes {
		for _, c := range cases {
			data := append([]float64(nil), c.data...)
			round32(data)
			for _, axis := range []int{0, 1} {
				got := eval(t, dt, []arg{{"a", c.rows, c.cols, data}}, func(in []*G.Node) (*G.Node, error) {
					return losses.LogSumExp(in[0], axis)
				})
				// reference: gonum floats.LogSumExp
				want := lseRef(data, c.rows, c.cols, axis)
				tol := valTol(dt)
				if dt == tensor.Float32 && c.name == "huge" {
					tol = 1e-6 // relative to values near 1e3
				}
				for i := range want {
					if !closeTo(got[i], want[i], tol, 1) {
						t.Errorf("%v %s axis %d [%d]: %v, want %v", dt, c.name, axis, i, got[i], want[i])
					}
				}
			}
		}
	}
	// A column of only -Inf has sum 0, log -Inf (gonum agrees).
	got := eval(t, tensor.Float64, []arg{{"a", 2, 2, []float64{inf, 1, inf, 2}}}, func(in []*G.Node) (*G.Node, error) {
		return losses.LogSumExp(in[0], 0)
	})
	// reference: gonum floats.LogSumExp
	if want := floats.LogSumExp([]float64{inf, inf}); got[0] != want || !closeTo(got[1], floats.LogSumExp([]float64{1, 2}), 1e-12, 1) {
		t.Errorf("all -Inf column: %v, want [%v %v]", got, want, floats.LogSumExp([]float64{1, 2}))
	}
}

func TestBoundGradients(t *testing.T) {
	rng := rand.New(rand.NewPCG(22, 23))
	const rows, cols = 3, 5
	a := randn(rng, rows*cols, 2)
	for _, axis := range []int{0, 1} {
		gradCheck(t, "LogSumExp", []arg{{"a", rows, cols, a}},
			func(in []*G.Node) (*G.Node, error) { return losses.LogSumExp(in[0], axis) },
			func(in [][]float64) []float64 { return lseRef(in[0], rows, cols, axis) })
	}
	// Large values: the softmax-weight gradient must stay exact.
	big := append([]float64(nil), a...)
	for i := range big {
		big[i] += 800
	}
	gradCheck(t, "LogSumExp large", []arg{{"a", rows, cols, big}},
		func(in []*G.Node) (*G.Node, error) { return losses.LogSumExp(in[0], 1) },
		func(in [][]float64) []float64 { return lseRef(in[0], rows, cols, 1) })

	for _, k := range []int{1, 4} {
		const n = 3
		logW := randn(rng, k*n, 2)
		gradCheck(t, "ImportanceWeighted", []arg{{"logW", k, n, logW}},
			func(in []*G.Node) (*G.Node, error) { return losses.ImportanceWeighted(in[0]) },
			func(in [][]float64) []float64 {
				out := make([]float64, n)
				for j := range out {
					// reference: Burda et al. 2016, L_K = log (1/K) sum_k w_k
					out[j] = floats.LogSumExp(column(in[0], k, n, j)) - math.Log(float64(k))
				}
				return out
			})
	}

	ll, kl := randn(rng, 4, 5), uniform(rng, 4, 0, 3)
	gradCheck(t, "ELBO", []arg{{"ll", 1, 4, ll}, {"kl", 1, 4, kl}, {"beta", 0, 0, []float64{0.3}}},
		func(in []*G.Node) (*G.Node, error) {
			l, err := G.Reshape(in[0], tensor.Shape{4})
			if err != nil {
				return nil, err
			}
			k, err := G.Reshape(in[1], tensor.Shape{4})
			if err != nil {
				return nil, err
			}
			return losses.ELBO(l, k, in[2])
		},
		func(in [][]float64) []float64 {
			out := make([]float64, 4)
			for i := range out {
				out[i] = in[0][i] - in[2][0]*in[1][i] // beta-VAE objective (Higgins et al. 2017)
			}
			return out
		})
}

// The beta node can change between runs without rebuilding the graph.
func TestELBOBetaIsLive(t *testing.T) {
	for _, dt := range dtypes {
		g := G.NewGraph()
		ll := G.NewVector(g, dt, G.WithShape(2), G.WithName("ll"), G.WithValue(denseOf(dt, []int{2}, []float64{-3, -4})))
		kl := G.NewVector(g, dt, G.WithShape(2), G.WithName("kl"), G.WithValue(denseOf(dt, []int{2}, []float64{1, 2})))
		beta := scalarInput(g, dt, "beta", 0)
		e, err := losses.ELBO(ll, kl, beta)
		if err != nil {
			t.Fatal(err)
		}
		ew := watch(e)
		vm := G.NewTapeMachine(g)
		for _, b := range []float64{0, 0.5, 1} {
			var v any = b
			if dt == tensor.Float32 {
				v = float32(b)
			}
			if err := G.Let(beta, v); err != nil {
				t.Fatal(err)
			}
			if err := vm.RunAll(); err != nil {
				t.Fatal(err)
			}
			// reference: ELBO = log p(x|z) - beta * KL, evaluated by hand
			checkAll(t, "ELBO", values(t, ew), []float64{-3 - b*1, -4 - b*2}, 1e-7, 1)
			vm.Reset()
		}
		vm.Close()
	}
}

func TestBoundBadInput(t *testing.T) {
	g := G.NewGraph()
	m := input(g, tensor.Float64, "m", 2, 3, make([]float64, 6))
	empty := G.NewMatrix(g, tensor.Float64, G.WithShape(0, 3), G.WithName("empty"))
	vec := G.NewVector(g, tensor.Float64, G.WithShape(3), G.WithName("vec"), G.WithValue(tensor.New(tensor.WithBacking([]float64{0, 0, 0}))))
	vec2 := G.NewVector(g, tensor.Float64, G.WithShape(2), G.WithName("vec2"), G.WithValue(tensor.New(tensor.WithBacking([]float64{0, 0}))))
	vec32 := G.NewVector(g, tensor.Float32, G.WithShape(3), G.WithName("vec32"), G.WithValue(tensor.New(tensor.WithBacking([]float32{0, 0, 0}))))
	beta := scalarInput(g, tensor.Float64, "beta", 1)
	beta32 := scalarInput(g, tensor.Float32, "beta32", 1)
	cases := []struct {
		name string
		arg  string
		call func() (*G.Node, error)
	}{
		{"ELBO nil logLik", "logLik", func() (*G.Node, error) { return losses.ELBO(nil, vec, beta) }},
		{"ELBO nil kl", "kl", func() (*G.Node, error) { return losses.ELBO(vec, nil, beta) }},
		{"ELBO nil beta", "beta", func() (*G.Node, error) { return losses.ELBO(vec, vec, nil) }},
		{"ELBO matrix", "logLik", func() (*G.Node, error) { return losses.ELBO(m, m, beta) }},
		{"ELBO kl shape", "kl", func() (*G.Node, error) { return losses.ELBO(vec, vec2, beta) }},
		{"ELBO kl dtype", "kl", func() (*G.Node, error) { return losses.ELBO(vec, vec32, beta) }},
		{"ELBO beta vector", "beta", func() (*G.Node, error) { return losses.ELBO(vec, vec, vec) }},
		{"ELBO beta dtype", "beta", func() (*G.Node, error) { return losses.ELBO(vec, vec, beta32) }},
		{"LogSumExp nil", "a", func() (*G.Node, error) { return losses.LogSumExp(nil, 0) }},
		{"LogSumExp vector", "a", func() (*G.Node, error) { return losses.LogSumExp(vec, 0) }},
		{"LogSumExp axis 2", "axis", func() (*G.Node, error) { return losses.LogSumExp(m, 2) }},
		{"LogSumExp axis -1", "axis", func() (*G.Node, error) { return losses.LogSumExp(m, -1) }},
		{"ImportanceWeighted nil", "logW", func() (*G.Node, error) { return losses.ImportanceWeighted(nil) }},
		{"ImportanceWeighted vector", "logW", func() (*G.Node, error) { return losses.ImportanceWeighted(vec) }},
		{"ImportanceWeighted K=0", "logW", func() (*G.Node, error) { return losses.ImportanceWeighted(empty) }},
	}
	checkBad(t, cases)
}
