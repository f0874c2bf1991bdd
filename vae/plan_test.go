package vae

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
)

// The lean inference path must give the numbers of the graph path, which
// the rest of the suite checks against references outside the project
// (gonum, closed forms from the papers named there). Tolerances: float64
// to 1e-12 and float32 to 1e-5, relative to the larger magnitude, values
// of magnitude below 1 compared absolutely.

// leanCase builds one model of the equality tests and its data.
type leanCase struct {
	name  string
	build func(t *testing.T, dt tensor.Dtype) *Model
	data  func(t *testing.T, m *Model) *dataset.Set
}

// perturb adds N(0, 0.3^2) noise to every parameter so that biases,
// learned priors and learned sigmas are not at their zero start.
func perturb(t *testing.T, m *Model, seed uint64) *Model {
	t.Helper()
	rng := rand.New(rand.NewPCG(seed, 99))
	for _, p := range m.Params() {
		switch d := p.Value.Data().(type) {
		case []float32:
			for i := range d {
				d[i] += float32(0.3 * rng.NormFloat64())
			}
		case []float64:
			for i := range d {
				d[i] += 0.3 * rng.NormFloat64()
			}
		}
	}
	return m
}

func mustMLP(t *testing.T, cfg MLPConfig) *Model {
	t.Helper()
	m, err := NewMLP(cfg)
	if err != nil {
		t.Fatalf("NewMLP: %v", err)
	}
	return perturb(t, m, cfg.Seed)
}

func labelled(t *testing.T, s *dataset.Set, classes int) *dataset.Set {
	t.Helper()
	labels := make([]int, s.Len())
	for i := range labels {
		labels[i] = (i * 7) % classes
	}
	return withLabels(t, s, labels, classes)
}

// imageModel is a conditional convolutional model on 1x6x6 inputs with two
// classes: every layer kind of the layers package appears in it.
func imageModel(t *testing.T, dt tensor.Dtype) *Model {
	t.Helper()
	opt := layers.Options{Dtype: dt, Seed: 3}
	must := func(l layers.Layer, err error) layers.Layer {
		t.Helper()
		if err != nil {
			t.Fatal(err)
		}
		return l
	}
	conv1 := must(layers.NewConv2D("enc.conv", layers.Conv2DConfig{In: 3, Out: 4, Kernel: [2]int{3, 3}, Stride: [2]int{2, 2}, Padding: [2]int{1, 1}, Activation: layers.ELU}, opt))
	encDense := must(layers.NewDense("enc.dense", 36, 10, opt))
	enc := must(layers.NewSequential("enc", conv1, layers.NewFlatten("enc.flat"), encDense, layers.Tanh))
	head, err := layers.NewGaussianHead("head", 10, 2, opt)
	if err != nil {
		t.Fatal(err)
	}
	decDense := must(layers.NewDense("dec.dense", 4, 36, opt))
	reshape := must(layers.NewReshape("dec.reshape", 4, 3, 3))
	up := must(layers.NewUpsample("dec.up", 2))
	conv2 := must(layers.NewConv2D("dec.conv", layers.Conv2DConfig{In: 4, Out: 3, Kernel: [2]int{2, 2}, Padding: [2]int{1, 1}, Activation: layers.LeakyReLU}, opt))
	conv3 := must(layers.NewConv2D("dec.conv2", layers.Conv2DConfig{In: 3, Out: 1, Kernel: [2]int{2, 2}}, opt))
	// The ELU after the upsampling runs as an activation step of its own.
	dec := must(layers.NewSequential("dec", decDense, layers.Softplus, reshape, up, layers.ELU, conv2, conv3, layers.NewFlatten("dec.flat")))
	lik, err := losses.NewLearnedGaussian("lik", 36, dt)
	if err != nil {
		t.Fatal(err)
	}
	m, err := New(Config{InputShape: []int{1, 6, 6}, Encoder: enc, Head: head, Decoder: dec, Likelihood: lik, Classes: 2, Dtype: dt})
	if err != nil {
		t.Fatalf("New: %v", err)
	}
	return perturb(t, m, 3)
}

// seqModel is a flat model whose encoder has an activation after an MLP
// that already ends in one (so it runs as a step of its own, also on the
// feature-major path) and whose decoder is a Sequential of Dense layers.
func seqModel(t *testing.T, dt tensor.Dtype) *Model {
	t.Helper()
	opt := layers.Options{Dtype: dt, Seed: 9}
	mlp, err := layers.NewMLP("enc.mlp", layers.MLPConfig{Sizes: []int{8, 12, 10}, Output: layers.ReLU}, opt)
	if err != nil {
		t.Fatal(err)
	}
	d1, _ := layers.NewDense("enc.d", 10, 6, opt)
	enc, err := layers.NewSequential("enc", mlp, layers.Sigmoid, d1, layers.Identity)
	if err != nil {
		t.Fatal(err)
	}
	head, _ := layers.NewGaussianHead("head", 6, 3, opt)
	d2, _ := layers.NewDense("dec.a", 3, 7, opt)
	d3, _ := layers.NewDense("dec.b", 7, 8, opt)
	dec, err := layers.NewSequential("dec", d2, layers.Tanh, layers.Softplus, d3)
	if err != nil {
		t.Fatal(err)
	}
	m, err := New(Config{InputShape: []int{8}, Encoder: enc, Head: head, Decoder: dec, Dtype: dt})
	if err != nil {
		t.Fatal(err)
	}
	return perturb(t, m, 9)
}

func leanCases() []leanCase {
	real := func(t *testing.T, m *Model) *dataset.Set {
		s := realSet(t, 150, m.Features(), 5)
		if m.Classes() > 0 {
			s = labelled(t, s, m.Classes())
		}
		return s
	}
	binary := func(t *testing.T, m *Model) *dataset.Set { return binarySet(t, 150, m.Features(), 5) }
	return []leanCase{
		{"bernoulli relu standard", func(t *testing.T, dt tensor.Dtype) *Model {
			return mustMLP(t, MLPConfig{Input: 10, Hidden: []int{8, 6}, Latent: 3, Dtype: dt, Seed: 1})
		}, binary},
		{"gaussian tanh", func(t *testing.T, dt tensor.Dtype) *Model {
			return mustMLP(t, MLPConfig{Input: 7, Hidden: []int{9}, Latent: 2, Activation: layers.Tanh, Likelihood: losses.Gaussian{Sigma: 0.7}, Dtype: dt, Seed: 2})
		}, real},
		{"sigmoid learned sigma diagonal prior", func(t *testing.T, dt tensor.Dtype) *Model {
			lik, _ := losses.NewLearnedGaussian("lik", 7, dt)
			pr, _ := priors.NewDiagonal("dprior", 3, dt)
			return mustMLP(t, MLPConfig{Input: 7, Hidden: []int{9}, Latent: 3, Activation: layers.Sigmoid, Likelihood: lik, Prior: pr, Dtype: dt, Seed: 3})
		}, real},
		{"softplus mixture prior", func(t *testing.T, dt tensor.Dtype) *Model {
			pr, _ := priors.NewMixture("mix", 3, 2, priors.MixtureOptions{Dtype: dt, Seed: 4})
			return mustMLP(t, MLPConfig{Input: 6, Hidden: []int{8}, Latent: 2, Activation: layers.Softplus, Likelihood: losses.Gaussian{}, Prior: pr, Dtype: dt, Seed: 4})
		}, real},
		{"elu vamp prior", func(t *testing.T, dt tensor.Dtype) *Model {
			mk := func(enc layers.Layer, head *layers.GaussianHead) (priors.Prior, error) {
				return priors.NewVamp("vamp", 4, []int{6}, enc, head, priors.VampOptions{Dtype: dt, Seed: 5})
			}
			return mustMLP(t, MLPConfig{Input: 6, Hidden: []int{8}, Latent: 2, Activation: layers.ELU, MakePrior: mk, Dtype: dt, Seed: 5})
		}, binary},
		{"leaky relu conditional flat", func(t *testing.T, dt tensor.Dtype) *Model {
			return mustMLP(t, MLPConfig{Input: 8, Hidden: []int{10, 6}, Latent: 3, Activation: layers.LeakyReLU, Likelihood: losses.Gaussian{Sigma: 1.3}, Classes: 3, Dtype: dt, Seed: 6})
		}, real},
		{"conditional image conv", imageModel, real},
		{"sequential with activation steps", seqModel, binary},
	}
}

func tolFor(dt tensor.Dtype) float64 {
	if dt == tensor.Float64 {
		return 1e-12
	}
	return 1e-5
}

func near(a, b, tol float64) bool {
	if math.IsNaN(a) || math.IsNaN(b) {
		return false
	}
	return math.Abs(a-b) <= tol*math.Max(1, math.Max(math.Abs(a), math.Abs(b)))
}

func checkNear(t *testing.T, what string, got, want []float64, tol float64) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%s: %d values, want %d", what, len(got), len(want))
	}
	for i := range got {
		if !near(got[i], want[i], tol) {
			t.Fatalf("%s[%d]: lean %.17g, graph %.17g (tolerance %g)", what, i, got[i], want[i], tol)
		}
	}
}

func mustPlan(t *testing.T, m *Model) *leanPlan {
	t.Helper()
	lp, ok, err := m.leanPlan()
	if !ok {
		t.Fatalf("leanPlan: %v", err)
	}
	return lp
}

// TestLeanEqualsGraph compares the lean path with every graph-path method
// on every built-in part, in both dtypes.
func TestLeanEqualsGraph(t *testing.T) {
	ctx := context.Background()
	for _, dt := range []tensor.Dtype{tensor.Float64, tensor.Float32} {
		for _, tc := range leanCases() {
			t.Run(dt.String()+"/"+tc.name, func(t *testing.T) {
				m := tc.build(t, dt)
				data := tc.data(t, m)
				tol := tolFor(dt)
				lp := mustPlan(t, m)
				n, f, d := data.Len(), m.Features(), m.Latent()
				x := data.Values()
				labels := data.Labels()

				for _, k := range []int{1, 3} {
					want, err := m.Score(ctx, data, ScoreOptions{K: k, Seed: 11})
					if err != nil {
						t.Fatal(err)
					}
					got := make([]float64, n)
					e := leanEval{k: k, seed: 11, score: got}
					if err := lp.evaluate(ctx, x, labels, n, &e, 2); err != nil {
						t.Fatal(err)
					}
					checkNear(t, "Score K="+string(rune('0'+k)), got, want, tol)
				}

				// Evaluate at K = 1 and K = 3: the averages of the per-record terms.
				for _, k := range []int{1, 3} {
					rep, err := m.Evaluate(ctx, data, EvalOptions{K: k, Seed: 4})
					if err != nil {
						t.Fatal(err)
					}
					ll, kl, iw := make([]float64, n), make([]float64, n), make([]float64, n)
					e := leanEval{k: k, seed: 4, logLik: ll, kl: kl, iw: iw}
					if err := lp.evaluate(ctx, x, labels, n, &e, 1); err != nil {
						t.Fatal(err)
					}
					var rec, klSum, nll float64
					for i := range ll {
						rec -= ll[i]
						klSum += kl[i]
						nll -= iw[i]
					}
					got := []float64{rec / float64(n), klSum / float64(n)}
					want := []float64{rep.Reconstruction, rep.KL}
					if k > 1 {
						got, want = append(got, nll/float64(n)), append(want, rep.NLL)
					}
					checkNear(t, "Evaluate", got, want, tol)
				}

				mean, sigma, err := m.Encode(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				gm, gs := make([]float64, n*d), make([]float64, n*d)
				lp.encode(x, labels, n, gm, gs)
				checkNear(t, "Encode mean", gm, mean.RawMatrix().Data, tol)
				checkNear(t, "Encode sigma", gs, sigma.RawMatrix().Data, tol)

				rec, err := m.Reconstruct(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				gr := make([]float64, n*f)
				lp.reconstruct(x, labels, n, gr)
				checkNear(t, "Reconstruct", gr, rec.RawMatrix().Data, tol)

				dec, err := m.Decode(ctx, mean, labels)
				if err != nil {
					t.Fatal(err)
				}
				gd := make([]float64, n*f)
				lp.decode(mean.RawMatrix().Data, labels, n, gd)
				checkNear(t, "Decode", gd, dec.RawMatrix().Data, tol)
			})
		}
	}
}

// TestLeanUserLayer checks that a user layer without LeanLayer makes the
// plan report ErrNotLean, and that one implementing it joins the plan and
// gives the graph's numbers.
func TestLeanUserLayer(t *testing.T) {
	ctx := context.Background()
	build := func(enc layers.Layer) *Model {
		head, _ := layers.NewGaussianHead("head", 5, 2, layers.Options{Dtype: tensor.Float64, Seed: 1})
		dec, _ := layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{2, 5, 4}}, layers.Options{Dtype: tensor.Float64, Seed: 2})
		m, err := New(Config{InputShape: []int{4}, Encoder: enc, Head: head, Decoder: dec, Dtype: tensor.Float64})
		if err != nil {
			t.Fatal(err)
		}
		return perturb(t, m, 7)
	}
	inner, _ := layers.NewDense("enc", 4, 5, layers.Options{Dtype: tensor.Float64, Seed: 3})
	m := build(opaqueLayer{inner})
	if _, ok, err := m.leanPlan(); ok || !errors.Is(err, ErrNotLean) {
		t.Fatalf("user layer without LeanLayer: ok %v, err %v; want ErrNotLean", ok, err)
	}
	m = build(leanSquare{inner})
	lp := mustPlan(t, m)
	data := binarySet(t, 9, 4, 2)
	want, err := m.Score(ctx, data, ScoreOptions{K: 2, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	got := make([]float64, 9)
	e := leanEval{k: 2, seed: 1, score: got}
	if err := lp.evaluate(ctx, data.Values(), nil, 9, &e, 1); err != nil {
		t.Fatal(err)
	}
	checkNear(t, "Score", got, want, 1e-12)
}

// opaqueLayer wraps a layer without implementing LeanLayer.
type opaqueLayer struct{ l layers.Layer }

func (o opaqueLayer) Forward(s *layers.Scope, x *G.Node) (*G.Node, error) { return o.l.Forward(s, x) }
func (o opaqueLayer) Params() []*layers.Param                             { return o.l.Params() }

// leanSquare is a user layer, dense followed by squaring, with a lean form.
type leanSquare struct{ d *layers.Dense }

func (l leanSquare) Forward(s *layers.Scope, x *G.Node) (*G.Node, error) {
	y, err := l.d.Forward(s, x)
	if err != nil {
		return nil, err
	}
	return G.Square(y)
}
func (l leanSquare) Params() []*layers.Param { return l.d.Params() }
func (l leanSquare) LeanShape(in []int) ([]int, error) {
	if len(in) != 1 || in[0] != l.d.In() {
		return nil, errors.New("bad input")
	}
	return []int{l.d.Out()}, nil
}
func (l leanSquare) LeanForward32(in, out []float32, rows int) {}
func (l leanSquare) LeanForward64(in, out []float64, rows int) {
	w, b := l.d.Weight().Value.Float64s(), l.d.Bias().Value.Float64s()
	x := mat.NewDense(rows, l.d.In(), in)
	y := mat.NewDense(rows, l.d.Out(), out)
	y.Mul(x, mat.NewDense(l.d.In(), l.d.Out(), w))
	for i := 0; i < rows; i++ {
		for j := 0; j < l.d.Out(); j++ {
			v := y.At(i, j) + b[j]
			y.Set(i, j, v*v)
		}
	}
}

// TestLeanActivationSteps makes sure the equality cases above exercise
// activations as steps of their own (not only fused into a layer).
func TestLeanActivationSteps(t *testing.T) {
	count := func(ops []leanOp[float64]) int {
		n := 0
		for _, op := range ops {
			if _, ok := op.(*actOp[float64]); ok {
				n++
			}
		}
		return n
	}
	seq := mustPlan(t, seqModel(t, tensor.Float64)).p64
	img := mustPlan(t, imageModel(t, tensor.Float64)).p64
	if count(seq.enc) != 1 || count(seq.dec) != 1 || count(img.dec) != 1 {
		t.Fatalf("activation steps: sequential encoder %d, decoder %d, image decoder %d; want 1 each",
			count(seq.enc), count(seq.dec), count(img.dec))
	}
	if !denseChain(seq.enc) || denseChain(img.dec) {
		t.Fatal("the sequential encoder should run feature-major on batches and the image decoder should not")
	}
}
