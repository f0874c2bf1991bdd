package vae

import (
	"context"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
	"lowerbound.dev/vae/schedule"
)

// trainBoth trains two copies of one model, one on the graphs and one on
// the lean path, and returns them with their histories. It fails the test
// unless each ran on the path it was meant to.
func trainBoth(t *testing.T, mk func() *Model, data *dataset.Set, cfg TrainConfig) (graph, lean *Model, gh, lh []EpochInfo) {
	t.Helper()
	graph, lean = mk(), mk()
	graph.graphTrain = true
	var err error
	if gh, err = graph.Train(context.Background(), data, cfg); err != nil {
		t.Fatalf("graph path: %v", err)
	}
	if lh, err = lean.Train(context.Background(), data, cfg); err != nil {
		t.Fatalf("lean path: %v", err)
	}
	if n := graph.builds[kindTrain].Load(); n != 1 {
		t.Fatalf("graph path compiled %d training graphs, want 1", n)
	}
	if n := lean.builds[kindTrain].Load(); n != 0 {
		t.Fatalf("lean path compiled %d training graphs, want 0", n)
	}
	return graph, lean, gh, lh
}

// The lean training path against the graph path: the reference is
// gorgonia's symbolic differentiation of the graph the SDK builds from
// losses.ELBO, losses.FreeBits and losses.CapacityPenalty, whose pieces
// have their own tests against gonum and closed forms. In float64 the two
// paths differ only in the order of rounding (the graph forms the KL and
// sampler in a few more steps), so after several optimiser steps every
// parameter agrees to 1e-9 relative to its size (1e-13 seen); a sign
// error, a missing factor or a wrong index in any derivative moves the
// parameters by about the learning rate per step, far beyond that.
func TestLeanTrainMatchesGraph(t *testing.T) {
	xs := binarySet(t, 45, 12, 7)
	reals := realSet(t, 45, 12, 8)
	labels := make([]int, 45)
	for i := range labels {
		labels[i] = i % 3
	}
	labelled, err := xs.WithLabels(labels, 3)
	if err != nil {
		t.Fatal(err)
	}
	labels129 := make([]int, 129)
	for i := range labels129 {
		labels129[i] = i % 3
	}
	labelled129, err := binarySet(t, 129, 12, 9).WithLabels(labels129, 3)
	if err != nil {
		t.Fatal(err)
	}
	mlp := func(c MLPConfig) func() *Model {
		return func() *Model {
			c.Input, c.Latent, c.Dtype, c.Seed = 12, 3, tensor.Float64, 9
			if c.Hidden == nil {
				c.Hidden = []int{10, 8}
			}
			m, err := NewMLP(c)
			if err != nil {
				t.Fatal(err)
			}
			return m
		}
	}
	base := TrainConfig{Epochs: 2, BatchSize: 10, Seed: 3, LearnRate: 0.01} // 45 records: a ragged last batch
	cases := []struct {
		name string
		mk   func() *Model
		data *dataset.Set
		cfg  func(TrainConfig) TrainConfig
	}{
		{"tanh", mlp(MLPConfig{Activation: layers.Tanh}), xs, nil},
		{"relu", mlp(MLPConfig{Activation: layers.ReLU}), xs, nil},
		{"leaky relu", mlp(MLPConfig{Activation: layers.LeakyReLU}), xs, nil},
		{"elu", mlp(MLPConfig{Activation: layers.ELU}), xs, nil},
		{"sigmoid", mlp(MLPConfig{Activation: layers.Sigmoid}), xs, nil},
		{"softplus", mlp(MLPConfig{Activation: layers.Softplus, Hidden: []int{7}}), xs, nil},
		{"gaussian likelihood", mlp(MLPConfig{Activation: layers.Tanh, Likelihood: losses.Gaussian{Sigma: 0.7}}), reals, nil},
		{"conditional", mlp(MLPConfig{Activation: layers.Tanh, Classes: 3}), labelled, nil},
		{"sgd momentum and clipping", mlp(MLPConfig{}), xs, func(c TrainConfig) TrainConfig {
			c.Optimizer, c.Momentum, c.ClipNorm = SGD, 0.5, 2
			return c
		}},
		{"beta schedule", mlp(MLPConfig{Activation: layers.Tanh}), xs, func(c TrainConfig) TrainConfig {
			c.Beta = schedule.LinearWarmup{Start: 0, End: 1, Steps: 6}
			return c
		}},
		{"free bits", mlp(MLPConfig{Activation: layers.Tanh}), xs, func(c TrainConfig) TrainConfig {
			c.FreeBits = schedule.FreeBits{Lambda: 0.3}
			return c
		}},
		{"capacity", mlp(MLPConfig{Activation: layers.Tanh}), xs, func(c TrainConfig) TrainConfig {
			c.Capacity = schedule.Capacity{Gamma: 2, Max: 3, Steps: 8}
			return c
		}},
		{"learned noise", func() *Model {
			// A likelihood of its own for each model: it holds a parameter.
			return mlp(MLPConfig{Activation: layers.Tanh, Likelihood: learnedNoise(t, 12)})()
		}, reals, nil},
		{"columns with missing entries", columnsModel(t, 0, 12), mixedLeanSet(t, 45, 0), nil},
		{"conditional columns, two shards", columnsModel(t, 3, 13), mixedLeanSet(t, 129, 3), func(c TrainConfig) TrainConfig {
			c.BatchSize = 64
			return c
		}},
		// Batches of 64 and more run as two shards; 129 records in
		// batches of 64 end with a batch of one, whose first shard is
		// empty.
		{"two shards", mlp(MLPConfig{Activation: layers.Tanh, Classes: 3}), labelled129, func(c TrainConfig) TrainConfig {
			c.BatchSize = 64
			c.FreeBits = schedule.FreeBits{Lambda: 0.2}
			return c
		}},
		{"two shards clipped", mlp(MLPConfig{Activation: layers.ReLU}), labelled129, func(c TrainConfig) TrainConfig {
			c.BatchSize, c.ClipNorm = 64, 3
			return c
		}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			cfg := base
			if tc.cfg != nil {
				cfg = tc.cfg(cfg)
			}
			g, l, gh, lh := trainBoth(t, tc.mk, tc.data, cfg)
			for i := range gh {
				if d := math.Abs(gh[i].Loss - lh[i].Loss); d > 1e-9*math.Abs(gh[i].Loss) {
					t.Errorf("epoch %d: loss %v on the lean path, %v on the graphs", i+1, lh[i].Loss, gh[i].Loss)
				}
				if d := math.Abs(gh[i].KL - lh[i].KL); d > 1e-9*(1+math.Abs(gh[i].KL)) {
					t.Errorf("epoch %d: KL %v on the lean path, %v on the graphs", i+1, lh[i].KL, gh[i].KL)
				}
			}
			worst := 0.0
			for i, gp := range g.Params() {
				gw, lw := gp.Value.Data().([]float64), l.Params()[i].Value.Data().([]float64)
				for j := range gw {
					d := math.Abs(gw[j]-lw[j]) / (1 + math.Abs(gw[j]))
					worst = max(worst, d)
					if d > 1e-9 {
						t.Fatalf("%s[%d]: %v on the lean path, %v on the graphs", gp.Name, j, lw[j], gw[j])
					}
				}
			}
			t.Logf("largest relative parameter difference %.2g", worst)
		})
	}
}

// In float32 the lean path uses the fast kernels the graphs' fused ops use
// (Bernoulli, tanh) and forms the KL and sampler terms in float64 where
// the graphs stay in float32 (the columns likelihood is float64 in both), so the two agree to float32 rounding: after
// six Adam steps with learning rate 1e-3 the parameters (of order 0.1-1)
// differ by a few ulps. 1e-5 is far below what one wrong derivative moves
// a parameter (up to the learning rate, 1e-3, per step).
func TestLeanTrainMatchesGraphFloat32(t *testing.T) {
	bernoulli := func() *Model {
		m, err := NewMLP(MLPConfig{Input: 30, Hidden: []int{40, 40}, Latent: 5, Activation: layers.Tanh, Seed: 5})
		if err != nil {
			t.Fatal(err)
		}
		return m
	}
	columns := func() *Model {
		lik, err := losses.NewColumns("lik", leanSchema, tensor.Float32)
		if err != nil {
			t.Fatal(err)
		}
		m, err := NewMLP(MLPConfig{Input: len(leanSchema), Hidden: []int{9, 7}, Latent: 3, Activation: layers.Tanh,
			Likelihood: lik, Classes: 3, Seed: 13})
		if err != nil {
			t.Fatal(err)
		}
		return m
	}
	for _, tc := range []struct {
		name string
		mk   func() *Model
		data *dataset.Set
	}{
		{"bernoulli", bernoulli, binarySet(t, 60, 30, 3)},
		{"conditional columns", columns, mixedLeanSet(t, 60, 3)},
	} {
		t.Run(tc.name, func(t *testing.T) {
			g, l, gh, lh := trainBoth(t, tc.mk, tc.data, TrainConfig{Epochs: 2, BatchSize: 20, Seed: 4})
			for i := range gh {
				if d := math.Abs(gh[i].Loss - lh[i].Loss); d > 1e-5*math.Abs(gh[i].Loss) {
					t.Errorf("epoch %d: loss %v on the lean path, %v on the graphs", i+1, lh[i].Loss, gh[i].Loss)
				}
			}
			worst := 0.0
			for i, gp := range g.Params() {
				gw, lw := gp.Value.Float32s(), l.Params()[i].Value.Float32s()
				for j := range gw {
					d := math.Abs(float64(gw[j] - lw[j]))
					worst = max(worst, d)
					if d > 1e-5 {
						t.Fatalf("%s[%d]: %v on the lean path, %v on the graphs", gp.Name, j, lw[j], gw[j])
					}
				}
			}
			t.Logf("largest parameter difference %.2g", worst)
		})
	}
}

// The lean path's gradients against central finite differences of its own
// loss (gonum diff/fd, step 1e-6, float64), with the noise held fixed: an
// independent check of every derivative written out in train_lean.go, for
// conditional Bernoulli models, a learned-noise Gaussian and a
// conditional columns model with missing entries, with free bits and a
// capacity term switched on, at a point where some dimensions sit below
// the free-bits floor and some above it (the floor's kink is avoided: no dimension is within 1e-3 of
// it, see the check below).
func TestLeanTrainGradientsFiniteDifference(t *testing.T) {
	binary := func(t *testing.T) *dataset.Set {
		rng := rand.New(rand.NewPCG(5, 6))
		xs := make([]float64, 4*7)
		for i := range xs {
			xs[i] = float64(rng.IntN(2))
		}
		set, err := dataset.New(xs, 4, 7)
		if err == nil {
			set, err = set.WithLabels([]int{0, 1, 1, 0}, 2)
		}
		if err != nil {
			t.Fatal(err)
		}
		return set
	}
	mlp := func(act layers.Activation) func() *Model {
		return func() *Model {
			m, err := NewMLP(MLPConfig{Input: 7, Hidden: []int{6, 5}, Latent: 3, Activation: act, Classes: 2, Dtype: tensor.Float64, Seed: 2})
			if err != nil {
				t.Fatal(err)
			}
			return m
		}
	}
	learned := func() *Model {
		m, err := NewMLP(MLPConfig{Input: 7, Hidden: []int{6}, Latent: 3, Activation: layers.Tanh, Likelihood: learnedNoise(t, 7), Dtype: tensor.Float64, Seed: 4})
		if err != nil {
			t.Fatal(err)
		}
		return m
	}
	// The floors put at least one dimension on each side (seen in the log).
	for _, tc := range []struct {
		name   string
		mk     func() *Model
		data   func(t *testing.T) *dataset.Set
		lambda float64
	}{
		{"tanh", mlp(layers.Tanh), binary, 0.095},
		{"elu", mlp(layers.ELU), binary, 1},
		{"softplus", mlp(layers.Softplus), binary, 1},
		{"learned noise", learned, func(t *testing.T) *dataset.Set { return realSet(t, 4, 7, 3) }, 0.5},
		{"conditional columns", columnsModel(t, 2, 6), func(t *testing.T) *dataset.Set { return mixedLeanSet(t, 4, 2) }, 0.2},
	} {
		t.Run(tc.name, func(t *testing.T) {
			m, set := tc.mk(), tc.data(t)
			lt, err := m.newLeanTrainer(4)
			if err != nil {
				t.Fatal(err)
			}
			tp := lt.(*trainPlan[float64])
			eps := tensor.New(tensor.WithShape(4, 3), tensor.Of(tensor.Float64))
			if err := layers.FillNormal(rand.New(rand.NewPCG(7, 8)), eps); err != nil {
				t.Fatal(err)
			}
			sc := stepScalars{beta: 0.8, freeBits: true, lambda: tc.lambda, capacity: true, gamma: 0.7, target: 0.2}
			idx := []int{2, 0, 3} // one row of the buffers left over, as in a ragged batch
			lossAt := func() float64 {
				_, _, loss, err := lt.step(set, idx, eps, sc)
				if err != nil {
					t.Fatal(err)
				}
				return loss
			}
			lossAt()
			for j, k := range tp.klDimAvg {
				if math.Abs(k-sc.lambda) < 1e-3 {
					t.Fatalf("dimension %d's KL %v is at the free-bits floor: pick another point", j, k)
				}
			}
			var below int
			for _, k := range tp.klDimAvg {
				if k < sc.lambda {
					below++
				}
			}
			t.Logf("KL per dimension %.3g (floor %v, %d below)", tp.klDimAvg, sc.lambda, below)
			if below == 0 || below == len(tp.klDimAvg) {
				t.Fatalf("%d of %d dimensions below the floor: pick a floor between them", below, len(tp.klDimAvg))
			}
			var grads [][]float64 // at the point itself, before any probe moves it
			for _, g := range lt.grads() {
				grads = append(grads, append([]float64(nil), g.Float64s()...))
			}
			for i, prm := range lt.params() {
				want := grads[i]
				w := prm.Value.Float64s()
				orig := append([]float64(nil), w...)
				num := fd.Gradient(nil, func(v []float64) float64 {
					copy(w, v)
					return lossAt()
				}, orig, &fd.Settings{Formula: fd.Central, Step: 1e-6})
				copy(w, orig)
				for j := range num {
					if d := math.Abs(num[j] - want[j]); d > 1e-6*(1+math.Abs(num[j])) {
						t.Errorf("%s[%d]: gradient %v, finite difference %v", prm.Name, j, want[j], num[j])
					}
				}
			}
		})
	}
}

// Models the lean training path does not run train on the graphs, and say
// why; models it does run take no graph.
func TestLeanTrainFallsBack(t *testing.T) {
	data := binarySet(t, 20, 8, 1)
	vamp := func(enc layers.Layer, head *layers.GaussianHead) (priors.Prior, error) {
		return priors.NewVamp("vamp", 3, []int{8}, enc, head, priors.VampOptions{Dtype: tensor.Float64, Seed: 1})
	}
	learned, err := losses.NewLearnedGaussian("noise", 8, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	diag, err := priors.NewDiagonal("prior", 2, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name string
		cfg  MLPConfig
		lean bool
	}{
		{"standard", MLPConfig{}, true},
		{"vamp prior", MLPConfig{MakePrior: vamp}, false},
		{"learned noise", MLPConfig{Likelihood: learned}, true},
		{"diagonal prior", MLPConfig{Prior: diag}, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c := tc.cfg
			c.Input, c.Hidden, c.Latent, c.Dtype, c.Seed = 8, []int{6}, 2, tensor.Float64, 3
			m, err := NewMLP(c)
			if err != nil {
				t.Fatal(err)
			}
			_, why := m.newLeanTrainer(5)
			if tc.lean != (why == nil) {
				t.Fatalf("lean trainer: %v, want lean %v", why, tc.lean)
			}
			if inf, tr := m.LeanPaths(); inf != nil || (tr == nil) != tc.lean {
				t.Errorf("LeanPaths: inference %v, training %v; want inference lean, training lean %v", inf, tr, tc.lean)
			}
			if why != nil && !errors.Is(why, ErrNotLeanTrain) {
				t.Errorf("reason %v does not wrap ErrNotLeanTrain", why)
			}
			if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 1, BatchSize: 5}); err != nil {
				t.Fatal(err)
			}
			want := int64(1)
			if tc.lean {
				want = 0
			}
			if n := m.builds[kindTrain].Load(); n != want {
				t.Errorf("compiled %d training graphs, want %d (%v)", n, want, fmt.Sprint(why))
			}
		})
	}
}

// The shards of a batch run on two goroutines or on one; the bits must not
// depend on which (nor on the race detector's scheduling).
func TestLeanTrainSameBitsOnAnyCores(t *testing.T) {
	data := binarySet(t, 300, 20, 4)
	run := func(procs int) []float32 {
		defer runtime.GOMAXPROCS(runtime.GOMAXPROCS(procs))
		m, err := NewMLP(MLPConfig{Input: 20, Hidden: []int{16}, Latent: 4, Activation: layers.Tanh, Seed: 8})
		if err != nil {
			t.Fatal(err)
		}
		if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 2, BatchSize: 128, Seed: 2}); err != nil {
			t.Fatal(err)
		}
		if n := m.builds[kindTrain].Load(); n != 0 {
			t.Fatalf("compiled %d training graphs, want the lean path", n)
		}
		var all []float32
		for _, p := range m.Params() {
			all = append(all, p.Value.Float32s()...)
		}
		return all
	}
	one, two := run(1), run(2)
	for i := range one {
		if math.Float32bits(one[i]) != math.Float32bits(two[i]) {
			t.Fatalf("value %d: %v on one core, %v on two", i, one[i], two[i])
		}
	}
}

func learnedNoise(t *testing.T, f int) losses.Likelihood {
	t.Helper()
	l, err := losses.NewLearnedGaussian("noise", f, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	// Raw log sigmas away from 0, so that their gradients are exercised
	// where the bound's slope is not one.
	for i, v := 0, l.Params()[0].Value.Float64s(); i < len(v); i++ {
		v[i] = -0.3 + 0.05*float64(i)
	}
	return l
}

// leanSchema has a column of every kind, two learning their sigma.
var leanSchema = []losses.Column{
	{Name: "temp", Kind: losses.ColumnReal, LearnSigma: true},
	{Name: "press", Kind: losses.ColumnReal, Sigma: 0.7},
	{Name: "flow", Kind: losses.ColumnPositive, LearnSigma: true},
	{Name: "starts", Kind: losses.ColumnCount},
	{Name: "open", Kind: losses.ColumnBinary},
	{Name: "mode", Kind: losses.ColumnCategorical, Categories: 3},
}

// columnsModel returns a maker of float64 MLP models over leanSchema.
func columnsModel(t *testing.T, classes int, seed uint64) func() *Model {
	return func() *Model {
		lik, err := losses.NewColumns("lik", leanSchema, tensor.Float64)
		if err != nil {
			t.Fatal(err)
		}
		for i, v := 0, lik.Params()[0].Value.Float64s(); i < len(v); i++ {
			v[i] = 0.2 - 0.1*float64(i)
		}
		m, err := NewMLP(MLPConfig{Input: len(leanSchema), Hidden: []int{9, 7}, Latent: 3, Activation: layers.Tanh,
			Likelihood: lik, Classes: classes, Dtype: tensor.Float64, Seed: seed})
		if err != nil {
			t.Fatal(err)
		}
		return m
	}
}

// mixedLeanSet returns n records for leanSchema, about 15% of entries
// missing, with labels when classes > 0.
func mixedLeanSet(t *testing.T, n, classes int) *dataset.Set {
	t.Helper()
	rng := rand.New(rand.NewPCG(uint64(n), 3))
	x := make([]float64, 0, n*len(leanSchema))
	for i := 0; i < n; i++ {
		z := rng.NormFloat64()
		row := []float64{z + 0.3*rng.NormFloat64(), 2 - z + 0.5*rng.NormFloat64(), math.Exp(0.5*z + 0.2*rng.NormFloat64()),
			float64(rng.IntN(4)), float64(rng.IntN(2)), float64(rng.IntN(3))}
		for j := range row {
			if rng.Float64() < 0.15 {
				row[j] = math.NaN()
			}
		}
		x = append(x, row...)
	}
	s, err := dataset.NewMissing(x, n, len(leanSchema))
	if err != nil {
		t.Fatal(err)
	}
	if classes > 0 {
		labels := make([]int, n)
		for i := range labels {
			labels[i] = i % classes
		}
		if s, err = s.WithLabels(labels, classes); err != nil {
			t.Fatal(err)
		}
	}
	return s
}
