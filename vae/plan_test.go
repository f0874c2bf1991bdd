package vae

import (
	"context"
	"errors"
	"fmt"
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

// graphOnly makes m run every inference method on the graphs, as a model
// with a part the lean path does not support does (tests only).
func graphOnly(m *Model) *Model {
	m.lean, m.leanWhy = nil, fmt.Errorf("%w: graph path forced by a test", ErrNotLean)
	return m
}

// graphBuilds is the number of inference graphs m has compiled.
func graphBuilds(m *Model) int64 {
	var n int64
	for _, k := range []programKind{kindEvaluate, kindEncode, kindDecode, kindReconstruct} {
		n += m.builds[k].Load()
	}
	return n
}

// TestLeanEqualsGraph runs every inference method on two copies of one
// model, one on the lean path (the default) and one forced onto the
// graphs, on every built-in part, in both dtypes: the results must agree.
// The lean copy must compile no graph while doing so.
func TestLeanEqualsGraph(t *testing.T) {
	ctx := context.Background()
	for _, dt := range []tensor.Dtype{tensor.Float64, tensor.Float32} {
		for _, tc := range leanCases() {
			t.Run(dt.String()+"/"+tc.name, func(t *testing.T) {
				lean := tc.build(t, dt)
				graph := graphOnly(tc.build(t, dt))
				if lean.lean == nil {
					t.Fatalf("the model is not on the lean path: %v", lean.leanWhy)
				}
				data := tc.data(t, lean)
				tol := tolFor(dt)
				builds, graphs := graphBuilds(lean), graphBuilds(graph)
				n := data.Len()
				var labels []int
				if lean.Classes() > 0 {
					labels = data.Labels()
				}

				for _, opt := range []ScoreOptions{{K: 1, Seed: 11}, {K: 3, Seed: 11}, {AtPosteriorMean: true}} {
					want, err := graph.Score(ctx, data, opt)
					if err != nil {
						t.Fatal(err)
					}
					got, err := lean.Score(ctx, data, opt)
					if err != nil {
						t.Fatal(err)
					}
					checkNear(t, fmt.Sprintf("Score %+v", opt), got, want, tol)
					// The Scorer gives the same numbers (one record at a
					// time for the first few).
					s, err := lean.NewScorer(ScorerOptions{K: opt.K, Seed: opt.Seed, Mean: opt.AtPosteriorMean})
					if err != nil {
						t.Fatal(err)
					}
					sc := make([]float64, n)
					if err := s.Score(ctx, sc, Records{X: data.Values(), Labels: labels}, nil); err != nil {
						t.Fatal(err)
					}
					checkNear(t, fmt.Sprintf("Scorer %+v", opt), sc, want, tol)
					x := data.Values()
					f := lean.Features()
					for i := 0; i < 3; i++ {
						r := Records{X: x[i*f : (i+1)*f], Keys: []uint64{uint64(i)}}
						if labels != nil {
							r.Labels = labels[i : i+1]
						}
						if err := s.Score(ctx, sc[:1], r, nil); err != nil {
							t.Fatal(err)
						}
						checkNear(t, fmt.Sprintf("Scorer %+v record %d alone", opt, i), sc[:1], want[i:i+1], tol)
					}
				}

				for _, k := range []int{1, 3} {
					want, err := graph.Evaluate(ctx, data, EvalOptions{K: k, Seed: 4})
					if err != nil {
						t.Fatal(err)
					}
					got, err := lean.Evaluate(ctx, data, EvalOptions{K: k, Seed: 4})
					if err != nil {
						t.Fatal(err)
					}
					if got.Records != want.Records || got.K != want.K || got.ActiveUnits != want.ActiveUnits ||
						(got.KLPerDim == nil) != (want.KLPerDim == nil) || math.IsNaN(got.NLL) != (k < 2) {
						t.Fatalf("Evaluate K=%d: lean %+v, graph %+v", k, got, want)
					}
					g := []float64{got.NegELBO, got.Reconstruction, got.KL}
					w := []float64{want.NegELBO, want.Reconstruction, want.KL}
					if k > 1 {
						g, w = append(g, got.NLL), append(w, want.NLL)
					}
					checkNear(t, fmt.Sprintf("Evaluate K=%d", k), g, w, tol)
					checkNear(t, "Evaluate KLPerDim", got.KLPerDim, want.KLPerDim, tol)
					checkNear(t, "Evaluate MeanVariance", got.MeanVariance, want.MeanVariance, tol)
				}

				mean, sigma, err := graph.Encode(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				gm, gs, err := lean.Encode(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Encode mean", gm.RawMatrix().Data, mean.RawMatrix().Data, tol)
				checkNear(t, "Encode sigma", gs.RawMatrix().Data, sigma.RawMatrix().Data, tol)

				rec, err := graph.Reconstruct(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				gr, err := lean.Reconstruct(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Reconstruct", gr.RawMatrix().Data, rec.RawMatrix().Data, tol)

				dec, err := graph.Decode(ctx, mean, labels)
				if err != nil {
					t.Fatal(err)
				}
				gd, err := lean.Decode(ctx, mean, labels)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Decode", gd.RawMatrix().Data, dec.RawMatrix().Data, tol)

				genLabels := make([]int, 5)
				if lean.Classes() == 0 {
					genLabels = nil
				}
				wantGen, err := graph.Generate(ctx, 5, genLabels, 8)
				if err != nil {
					t.Fatal(err)
				}
				gotGen, err := lean.Generate(ctx, 5, genLabels, 8)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Generate", gotGen.RawMatrix().Data, wantGen.RawMatrix().Data, tol)

				wantI, err := graph.Interpolate(ctx, data, 0, 1, 4)
				if err != nil {
					t.Fatal(err)
				}
				gotI, err := lean.Interpolate(ctx, data, 0, 1, 4)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Interpolate", gotI.RawMatrix().Data, wantI.RawMatrix().Data, tol)

				if b := graphBuilds(lean) - builds; b != 0 {
					t.Fatalf("the lean model compiled %d inference graphs", b)
				}
				if graphBuilds(graph) == graphs {
					t.Fatal("the graph model compiled no inference graph")
				}
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

// TestGraphFallback builds one model twice from the same seeds: once with
// a Dense encoder (lean path) and once with the same Dense wrapped in a
// user layer without LeanLayer. The second must run on the graphs (it
// compiles inference graphs, its Scorer reports ErrNotLean) and give the
// first one's numbers from every inference method, for a conditional
// model with a mixture prior (no closed-form KL).
func TestGraphFallback(t *testing.T) {
	ctx := context.Background()
	build := func(wrap func(layers.Layer) layers.Layer) *Model {
		opt := layers.Options{Dtype: tensor.Float64, Seed: 3}
		enc, _ := layers.NewDense("enc", 6, 5, opt)
		head, _ := layers.NewGaussianHead("head", 5, 2, layers.Options{Dtype: tensor.Float64, Seed: 1})
		dec, _ := layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{4, 5, 4}}, layers.Options{Dtype: tensor.Float64, Seed: 2})
		pr, _ := priors.NewMixture("mix", 3, 2, priors.MixtureOptions{Dtype: tensor.Float64, Seed: 4})
		m, err := New(Config{InputShape: []int{4}, Encoder: wrap(enc), Head: head, Decoder: dec, Prior: pr,
			Likelihood: losses.Gaussian{Sigma: 0.8}, Classes: 2, Dtype: tensor.Float64})
		if err != nil {
			t.Fatal(err)
		}
		return perturb(t, m, 7)
	}
	lean := build(func(l layers.Layer) layers.Layer { return l })
	user := build(func(l layers.Layer) layers.Layer { return opaqueLayer{l} })
	if lean.lean == nil {
		t.Fatalf("Dense encoder: not on the lean path: %v", lean.leanWhy)
	}
	if user.lean != nil || !errors.Is(user.leanWhy, ErrNotLean) {
		t.Fatalf("user encoder: lean plan %v, reason %v; want none, ErrNotLean", user.lean != nil, user.leanWhy)
	}
	data := labelled(t, realSet(t, 70, 4, 6), 2)
	labels := data.Labels()
	const tol = 1e-12
	builds := graphBuilds(user)
	for _, opt := range []ScoreOptions{{K: 1, Seed: 2}, {K: 4, Seed: 2, Keys: make([]uint64, 70)}, {AtPosteriorMean: true}} {
		want, err := lean.Score(ctx, data, opt)
		if err != nil {
			t.Fatal(err)
		}
		got, err := user.Score(ctx, data, opt)
		if err != nil {
			t.Fatal(err)
		}
		checkNear(t, fmt.Sprintf("Score %+v", opt), got, want, tol)
		s, err := user.NewScorer(ScorerOptions{K: opt.K, Seed: opt.Seed, Mean: opt.AtPosteriorMean})
		if err != nil {
			t.Fatal(err)
		}
		if ok, why := s.Lean(); ok || !errors.Is(why, ErrNotLean) {
			t.Fatalf("Scorer on the user model: lean %v, %v", ok, why)
		}
		sc := make([]float64, 70)
		if err := s.Score(ctx, sc, Records{X: data.Values(), Labels: labels, Keys: opt.Keys}, nil); err != nil {
			t.Fatal(err)
		}
		checkNear(t, fmt.Sprintf("Scorer %+v", opt), sc, want, tol)
		err = s.Score(ctx, sc, Records{X: data.Values(), Labels: labels}, make([]float64, 70*4))
		if !errors.Is(err, ErrNotLean) {
			t.Fatalf("per-feature terms through the graphs: %v, want ErrNotLean", err)
		}
	}
	want, err := lean.Evaluate(ctx, data, EvalOptions{K: 3, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	got, err := user.Evaluate(ctx, data, EvalOptions{K: 3, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	if got.KLPerDim != nil || want.KLPerDim != nil || got.ActiveUnits != want.ActiveUnits {
		t.Fatalf("Evaluate: user %+v, lean %+v", got, want)
	}
	checkNear(t, "Evaluate", []float64{got.NegELBO, got.Reconstruction, got.KL, got.NLL}, []float64{want.NegELBO, want.Reconstruction, want.KL, want.NLL}, tol)
	checkNear(t, "Evaluate MeanVariance", got.MeanVariance, want.MeanVariance, tol)
	pairs := []struct {
		name string
		call func(m *Model) (*mat.Dense, error)
	}{
		{"Encode", func(m *Model) (*mat.Dense, error) { mu, _, err := m.Encode(ctx, data); return mu, err }},
		{"Encode sigma", func(m *Model) (*mat.Dense, error) { _, s, err := m.Encode(ctx, data); return s, err }},
		{"Reconstruct", func(m *Model) (*mat.Dense, error) { return m.Reconstruct(ctx, data) }},
		{"Generate", func(m *Model) (*mat.Dense, error) { return m.Generate(ctx, 3, []int{1, 0, 1}, 9) }},
		{"Interpolate", func(m *Model) (*mat.Dense, error) { return m.Interpolate(ctx, data, 2, 5, 3) }},
	}
	for _, p := range pairs {
		w, err := p.call(lean)
		if err != nil {
			t.Fatalf("%s: %v", p.name, err)
		}
		g, err := p.call(user)
		if err != nil {
			t.Fatalf("%s: %v", p.name, err)
		}
		checkNear(t, p.name, g.RawMatrix().Data, w.RawMatrix().Data, tol)
	}
	if graphBuilds(user) == builds {
		t.Fatal("the user model compiled no inference graph: it did not fall back to the graphs")
	}
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
