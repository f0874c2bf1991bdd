package vae

import (
	"context"
	"errors"
	"math/rand/v2"
	"testing"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/vae/dataset"
)

// errBenchDone stops a benchmark's training run once the timed steps are
// done.
var errBenchDone = errors.New("benchmark done")

// BenchmarkTrainStep times one optimiser step of the standard MLP VAE
// (784-400-20, float32, Adam, batch 100) in steady state: the trainer is
// built and the first steps have run before the timer starts, so ns/op and
// allocs/op are those of one step of a long training run (a step's share of
// the per-epoch work, shuffling ten batches, included: that is the B/op
// left). It drives only Train's public hooks: the timer starts in OnStep
// after the warm-up steps and stops in OnStep after b.N more. With -graph
// (BenchmarkTrainStepGraph) the same on the graph path.
func BenchmarkTrainStep(b *testing.B) { benchTrainStep(b, false) }

// BenchmarkTrainStepGraph is BenchmarkTrainStep on the graph path, which
// models with parts the lean path does not run take.
func BenchmarkTrainStepGraph(b *testing.B) { benchTrainStep(b, true) }

func benchTrainStep(b *testing.B, graph bool) {
	const (
		warm          = 3  // steps before the timer starts
		stepsPerEpoch = 10 // 1000 records in batches of 100
	)
	m, data := benchModel(b), benchData(b, 100*stepsPerEpoch)
	m.graphTrain = graph
	stop := warm + b.N - 1 // the last timed step
	stopped := false
	cfg := TrainConfig{
		Epochs: (warm+b.N)/stepsPerEpoch + 1,
		Seed:   1,
		OnStep: func(s StepInfo) {
			switch s.Step {
			case warm - 1:
				b.ResetTimer()
			case stop:
				b.StopTimer()
				stopped = true
			}
		},
		OnEpoch: func(EpochInfo) error {
			if stopped {
				return errBenchDone
			}
			return nil
		},
	}
	b.ReportAllocs()
	if _, err := m.Train(context.Background(), data, cfg); err != nil && !errors.Is(err, errBenchDone) {
		b.Fatal(err)
	}
	if !stopped {
		b.Fatal("training ended before the timed steps were done")
	}
	b.ReportMetric(float64(b.N*100)/b.Elapsed().Seconds(), "records/s")
}

// BenchmarkLeanStep runs the lean path's step and update alone, batch
// 100, on both benchmark models (Burda et al. 2016's 784-200-200-50 tanh
// and the 784-400-20 ReLU model of the other benchmarks): allocs/op here is
// exactly the steady-state step's (0), with no per-epoch work to amortise.
func BenchmarkLeanStep(b *testing.B) {
	for _, bm := range []struct {
		name string
		cfg  MLPConfig
	}{
		{"784-200-200-50", MLPConfig{Input: 784, Hidden: []int{200, 200}, Latent: 50, Activation: layers.Tanh, Seed: 1}},
		{"784-400-20", MLPConfig{Input: 784, Hidden: []int{400}, Latent: 20, Seed: 1}},
	} {
		b.Run(bm.name, func(b *testing.B) {
			m, err := NewMLP(bm.cfg)
			if err != nil {
				b.Fatal(err)
			}
			benchLeanStep(b, m, benchData(b, 100))
		})
	}
}

func benchLeanStep(b *testing.B, m *Model, data *dataset.Set) {
	lt, err := m.newLeanTrainer(100)
	if err != nil {
		b.Fatal(err)
	}
	lt.start()
	defer lt.close()
	opt := newUpdater(TrainConfig{Optimizer: Adam, LearnRate: 1e-3})
	idx := make([]int, 100)
	for i := range idx {
		idx[i] = i
	}
	eps := tensor.New(tensor.WithShape(100, m.latent), tensor.Of(tensor.Float32))
	rng := rand.New(rand.NewPCG(1, 2))
	sc := stepScalars{beta: 1}
	step := func() {
		if err := layers.FillNormal(rng, eps); err != nil {
			b.Fatal(err)
		}
		if _, _, _, err := lt.step(data, idx, eps, sc); err != nil {
			b.Fatal(err)
		}
		if bad, err := lt.update(opt, 0); err != nil || bad >= 0 {
			b.Fatalf("update: %d, %v", bad, err)
		}
	}
	step() // the optimiser's state is allocated on its first step
	b.ReportAllocs()
	b.ResetTimer()
	for range b.N {
		step()
	}
	b.ReportMetric(float64(b.N*100)/b.Elapsed().Seconds(), "records/s")
}
